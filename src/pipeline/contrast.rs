//! Patch contrast normalisation inside a conv stage (banks from `bank learn`).
//!
//! A learned bank's features are defined on contrast-normalised patches
//! (Coates & Ng 2012, §2 of "Learning Feature Representations with K-means"):
//! x' = (x − mean(x)) / sqrt(var(x) + ε) over the samples of one window. The
//! taps of such a bank sum to zero, so taps · (x − mean(x)) = taps · x, and the
//! feature at an output pixel is
//!
//! ```text
//! out = (y − b) / sqrt(v + ε) + b,    y = scale · Σ taps · x + b (the plain conv)
//! ```
//!
//! with v the population variance of the samples the window reads (all
//! channels together, padding included, as the conv sees it). v comes from two
//! more passes of the same engine with a box kernel over x and x²: the window
//! means m and q, v = max(q − m², 0). The input is first shifted by its own
//! mean (variance does not change with a shift) so that offset float data do
//! not lose their variance to cancellation; not under zero padding, where the
//! padded zeros would move with the shift.

use ndarray::{Array3, ArrayView3};

use crate::border::PadMode;
use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::engine::{choose, run_prepared, ConvStage, Engine};
use crate::error::Error;
use crate::kernel::{Bank, Kernel, Op};

/// The window statistics a contrast-normalised conv stage needs.
#[derive(Debug)]
pub(crate) struct Contrast {
    eps: f32,
    /// One box kernel (1 / (channels · rows · cols) on every tap) with the
    /// conv stage's own pad, extent, stride and dilation.
    window: Box<PreparedStage>,
    engine: Engine,
    /// Each kernel's bias, added back after the division.
    biases: Vec<f32>,
    shift: bool,
}

impl Contrast {
    /// The window of `conv` over `channels × height × width` inputs, if its
    /// bank asks for contrast normalisation.
    pub(crate) fn of(
        conv: &ConvStage,
        shape: (usize, usize, usize),
    ) -> Result<Option<Contrast>, Error> {
        let Some(eps) = conv.bank.contrast else {
            return Ok(None);
        };
        let k0 = &conv.bank.kernels[0];
        let n = (shape.0 * k0.rows * k0.cols) as f64;
        let plane = vec![1.0 / n; k0.rows * k0.cols];
        let bank = Bank {
            name: "window-mean".into(),
            op: Op::Correlate,
            description: None,
            kernels: vec![Kernel {
                name: "window-mean".into(),
                rows: k0.rows,
                cols: k0.cols,
                planes: vec![plane; shape.0],
                scale: 1.0,
                bias: 0.0,
                origin: None,
                angle: None,
            }],
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
        };
        let mut options = conv.options;
        options.op = Some(Op::Correlate);
        let stage = ConvStage { bank, options };
        let window = stage.prepare(shape.0, shape.1, shape.2)?;
        let engine = choose(&window, Engine::Auto).engine;
        Ok(Some(Contrast {
            eps: eps as f32,
            window: Box::new(window),
            engine,
            biases: conv.bank.kernels.iter().map(|k| k.bias as f32).collect(),
            shift: conv.options.pad != PadMode::Zero,
        }))
    }

    /// Bytes of the extra maps a run holds: the squared input and two window maps.
    pub(crate) fn extra_bytes(&self) -> u64 {
        let w = &self.window;
        let input = w.channels * w.height * w.width;
        let maps = 2 * w.out_height * w.out_width;
        4 * (input + maps) as u64
    }

    /// Divides the conv maps `y` of input `x` by their windows' contrast.
    pub(crate) fn apply(
        &self,
        x: ArrayView3<f32>,
        y: &mut Array3<f32>,
        bufs: &Buffers,
    ) -> Result<(), Error> {
        let shift = if self.shift && !x.is_empty() {
            (x.iter().map(|v| *v as f64).sum::<f64>() / x.len() as f64) as f32
        } else {
            0.0
        };
        let mut v = bufs.scratch(x.len());
        v.iter_mut()
            .zip(x.iter())
            .for_each(|(d, s)| *d = *s - shift);
        let shifted = Array3::from_shape_vec(x.dim(), v).expect("sized from the input");
        let mean = run_prepared(&self.window, shifted.view(), self.engine, bufs, 0)?;
        let (raw, _) = shifted.into_raw_vec_and_offset();
        let mut sq = raw;
        sq.iter_mut().for_each(|s| *s *= *s);
        let squares = Array3::from_shape_vec(x.dim(), sq).expect("sized from the input");
        let mean_sq = run_prepared(&self.window, squares.view(), self.engine, bufs, 0)?;
        bufs.give(squares.into_raw_vec_and_offset().0);
        let m = mean.as_slice().expect("standard layout");
        let q = mean_sq.as_slice().expect("standard layout");
        let inv: Vec<f32> = m
            .iter()
            .zip(q)
            .map(|(m, q)| {
                let var = (*q as f64 - (*m as f64) * (*m as f64)).max(0.0);
                (1.0 / (var + self.eps as f64).sqrt()) as f32
            })
            .collect();
        bufs.give(mean.into_raw_vec_and_offset().0);
        bufs.give(mean_sq.into_raw_vec_and_offset().0);
        for (mut map, b) in y.outer_iter_mut().zip(&self.biases) {
            let map = map.as_slice_mut().expect("standard layout");
            map.iter_mut()
                .zip(&inv)
                .for_each(|(o, s)| *o = (*o - b) * s + b);
        }
        Ok(())
    }
}
