//! A conv stage checked against one input shape: per kernel, its padding and
//! output size (checked arithmetic, before anything is allocated), f32 taps in
//! correlation order (rotated by 180° for `convolve`), and rank-1 factors where
//! every plane has them. Built once per input shape by the plan and read by
//! every strategy; crate-private, so the invariants [`ConvStage::prepare`]
//! establishes (tap counts, sizes, equal output sizes) cannot be broken from
//! outside.

use crate::border::PadMode;
use crate::engine::ConvStage;
use crate::error::Error;
use crate::geometry::{axis_geometry, Axis};
use crate::kernel::Op;

pub use crate::geometry::KernelGeometry as Geometry;

/// One kernel ready for a strategy: f32 taps in correlation order.
#[derive(Debug, Clone)]
pub(crate) struct PreparedKernel {
    /// Tap rows.
    pub(crate) rows: usize,
    /// Tap columns.
    pub(crate) cols: usize,
    /// `channels × rows × cols` taps, correlation order (already rotated for `convolve`).
    pub(crate) taps: Vec<f32>,
    /// Multiplies the sum.
    pub(crate) scale: f32,
    /// Added after scaling.
    pub(crate) bias: f32,
    /// Padding and output size for this kernel.
    pub(crate) geometry: Geometry,
    /// When every plane has rank ≤ 1: per plane, its (column, row) factors in
    /// correlation order, or `None` for an all-zero plane.
    pub(crate) factors: Option<Vec<Option<Factors>>>,
}

/// Column factor u (k_h taps) and row factor v (k_w taps) of a rank-1 plane, t = u·vᵀ.
pub(crate) type Factors = (Vec<f32>, Vec<f32>);

/// Factors of every plane (correlation order), if all are rank ≤ 1.
fn plane_factors(planes: &[Vec<f64>], rows: usize, cols: usize) -> Option<Vec<Option<Factors>>> {
    use crate::kernel::analysis::{numeric_rank, rank1_factors, RANK_TOL};
    planes
        .iter()
        .map(|p| {
            let scale = p.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            if scale == 0.0 {
                return Some(None);
            }
            if numeric_rank(p, rows, cols, RANK_TOL * scale) != 1 {
                return None;
            }
            let (u, v) = rank1_factors(p, rows, cols)?;
            Some(Some((
                u.iter().map(|x| *x as f32).collect(),
                v.iter().map(|x| *x as f32).collect(),
            )))
        })
        .collect()
}

/// A conv stage checked against an input shape.
#[derive(Debug, Clone)]
pub(crate) struct PreparedStage {
    /// Input channels.
    pub(crate) channels: usize,
    /// Input height.
    pub(crate) height: usize,
    /// Input width.
    pub(crate) width: usize,
    /// Output height (the same for every kernel).
    pub(crate) out_height: usize,
    /// Output width.
    pub(crate) out_width: usize,
    /// Pad mode.
    pub(crate) pad: PadMode,
    /// The kernels.
    pub(crate) kernels: Vec<PreparedKernel>,
}

impl PreparedStage {
    /// Number of output values, checked.
    pub(crate) fn output_len(&self) -> Result<usize, Error> {
        self.kernels
            .len()
            .checked_mul(self.out_height)
            .and_then(|v| v.checked_mul(self.out_width))
            .ok_or_else(|| Error::Shape("output size overflows".into()))
    }

    /// Input samples the stage reads: channels × height × width.
    pub(crate) fn input_len(&self) -> usize {
        self.channels * self.height * self.width
    }

    /// The kernel with the largest dilated footprint: it sets the stage's receptive
    /// field and margins.
    pub(crate) fn widest(&self) -> &PreparedKernel {
        self.kernels
            .iter()
            .max_by_key(|k| k.geometry.rows.effective_kernel() * k.geometry.cols.effective_kernel())
            .expect("a prepared stage has kernels")
    }

    /// Multiply-adds of the whole stage.
    pub(crate) fn multiply_adds(&self) -> u128 {
        let outs = (self.out_height * self.out_width) as u128;
        self.kernels
            .iter()
            .map(|k| outs * (self.channels * k.rows * k.cols) as u128)
            .sum()
    }
}

impl ConvStage {
    /// The geometry of kernel `n` over an input of `height × width`.
    /// The padding and output size of kernel `n` over an input of
    /// `height × width` (the extent, stride and dilation of the stage).
    pub fn kernel_geometry(
        &self,
        n: usize,
        height: usize,
        width: usize,
    ) -> Result<Geometry, Error> {
        let k = &self.bank.kernels[n];
        let o = &self.options;
        let ctx =
            |e: Error| Error::Shape(format!("kernel '{}' ({}×{}): {e}", k.name, k.rows, k.cols));
        Ok(Geometry {
            rows: axis_geometry(
                Axis::Rows,
                height,
                k.rows,
                o.stride.0,
                o.dilation.0,
                o.extent,
            )
            .map_err(ctx)?,
            cols: axis_geometry(
                Axis::Cols,
                width,
                k.cols,
                o.stride.1,
                o.dilation.1,
                o.extent,
            )
            .map_err(ctx)?,
        })
    }

    /// The output shape (kernels, height, width) over an input of `channels ×
    /// height × width`, or why the stage cannot run on it (the same checks as
    /// running it: channels, sizes, kernels whose outputs differ).
    pub fn output_shape(
        &self,
        channels: usize,
        height: usize,
        width: usize,
    ) -> Result<(usize, usize, usize), Error> {
        let p = self.prepare(channels, height, width)?;
        Ok((p.kernels.len(), p.out_height, p.out_width))
    }

    /// Checks the stage against an input of `channels × height × width` and prepares
    /// f32 taps. Fails on a channel mismatch, impossible geometry, or kernels whose
    /// output sizes differ.
    pub(crate) fn prepare(
        &self,
        channels: usize,
        height: usize,
        width: usize,
    ) -> Result<PreparedStage, Error> {
        self.bank.validate()?;
        if self.bank.channels() != channels {
            return Err(Error::Shape(format!(
                "bank '{}' has kernels with {} plane(s) but its input has {channels} channel(s)",
                self.bank.name,
                self.bank.channels()
            )));
        }
        let op = self.op();
        let mut kernels = Vec::with_capacity(self.bank.kernels.len());
        for (n, k) in self.bank.kernels.iter().enumerate() {
            let geometry = self.kernel_geometry(n, height, width)?;
            // The padded copy of the input is the largest scratch buffer; its size
            // is checked before anything is allocated.
            geometry
                .rows
                .padded()
                .checked_mul(geometry.cols.padded())
                .and_then(|v| v.checked_mul(channels))
                .filter(|v| *v <= isize::MAX as usize / std::mem::size_of::<f32>())
                .ok_or_else(|| {
                    Error::Shape(format!(
                        "kernel '{}': the padded input ({channels} × {} × {}) is too large to hold",
                        k.name,
                        geometry.rows.padded(),
                        geometry.cols.padded()
                    ))
                })?;
            let planes: Vec<Vec<f64>> = (0..k.channels())
                .map(|c| match op {
                    Op::Correlate => k.planes[c].clone(),
                    Op::Convolve => k.rotated_plane(c),
                })
                .collect();
            kernels.push(PreparedKernel {
                rows: k.rows,
                cols: k.cols,
                taps: planes.iter().flatten().map(|v| *v as f32).collect(),
                scale: k.scale as f32,
                bias: k.bias as f32,
                geometry,
                factors: plane_factors(&planes, k.rows, k.cols),
            });
        }
        let g0 = kernels[0].geometry;
        if let Some((n, k)) = kernels.iter().enumerate().find(|(_, k)| {
            (k.geometry.rows.output, k.geometry.cols.output) != (g0.rows.output, g0.cols.output)
        }) {
            return Err(Error::Shape(format!(
                "bank '{}': kernel '{}' gives {}×{} outputs but '{}' gives {}×{} under extent {}; \
                 use extent same, or kernels of one size",
                self.bank.name,
                self.bank.kernels[n].name,
                k.geometry.cols.output,
                k.geometry.rows.output,
                self.bank.kernels[0].name,
                g0.cols.output,
                g0.rows.output,
                self.options.extent
            )));
        }
        let st = PreparedStage {
            channels,
            height,
            width,
            out_height: g0.rows.output,
            out_width: g0.cols.output,
            pad: self.options.pad,
            kernels,
        };
        st.output_len()?;
        Ok(st)
    }
}
