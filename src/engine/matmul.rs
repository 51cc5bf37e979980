//! The matrix-multiply strategy, for banks of many kernels or many input
//! channels: image-to-columns in bands of output rows, then one matrix product
//! per band (Chellapilla, Puri & Simard, "High Performance Convolutional Neural
//! Networks for Document Processing", 2006):
//!
//! ```text
//! X[(c,u,v)][(y,x)] = P_c[y·s_y + u·d_y][x·s_x + v·d_x]     (K = C·k_h·k_w rows)
//! OUT[n][(y,x)]     = Σ_(c,u,v) T[n][(c,u,v)] · X[(c,u,v)][(y,x)]
//! ```
//!
//! The product is ndarray's `general_mat_mul`, which runs the `matrixmultiply`
//! crate's single-threaded sgemm for these contiguous f32 blocks; bands run
//! in parallel on the rayon pool, each with its own column buffer of bounded
//! size, so no matrix library starts threads of its own. Band sizes do not depend
//! on the thread count, so neither do the results. All kernels must share one
//! size and padding (the planner checks).

use ndarray::linalg::general_mat_mul;
use ndarray::{ArrayView2, ArrayViewMut2};
use rayon::prelude::*;

use crate::engine::bands::{pad_input, row_bands};
use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::engine::Strategy;

/// Image-to-columns in row bands, then a matrix product per band.
pub(crate) struct Matmul;

/// Output samples per band: enough columns for an efficient product, few
/// enough that the column buffer (K × this) stays in cache.
const BAND_COLUMNS: usize = 2048;

impl Strategy for Matmul {
    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32], bufs: &Buffers) {
        let k0 = &st.kernels[0];
        let (gr, gc) = (k0.geometry.rows, k0.geometry.cols);
        let (ph, pw) = (gr.padded(), gc.padded());
        let (kh, kw, c) = (k0.rows, k0.cols, st.channels);
        let kk = c * kh * kw;
        let (oh, ow) = (st.out_height, st.out_width);
        let n = st.kernels.len();
        let mut padded_buf = Vec::new();
        pad_input(st, &k0.geometry, input, &mut padded_buf, bufs);
        let weights: Vec<f32> = st
            .kernels
            .iter()
            .flat_map(|k| k.taps.iter().copied())
            .collect();
        let band = (BAND_COLUMNS / ow.max(1)).clamp(1, oh.max(1));
        let ranges: Vec<(usize, usize)> = (0..oh)
            .step_by(band)
            .map(|y0| (y0, (y0 + band).min(oh)))
            .collect();
        let kernels: Vec<usize> = (0..n).collect();
        let dsts = row_bands(out, oh * ow, ow, &kernels, &ranges);
        let padded = &padded_buf[..];
        let weights = &weights[..];
        ranges.par_iter().zip(dsts).for_each_init(
            || (Vec::new(), Vec::new()),
            |(cols, prod), (&(y0, y1), mut dst)| {
                let m = (y1 - y0) * ow;
                cols.clear();
                cols.resize(kk * m, 0.0f32);
                for ci in 0..c {
                    let chan = &padded[ci * ph * pw..(ci + 1) * ph * pw];
                    for u in 0..kh {
                        for v in 0..kw {
                            let row = &mut cols[((ci * kh + u) * kw + v) * m..][..m];
                            for (yy, dst_row) in row.chunks_exact_mut(ow).enumerate() {
                                let y = y0 + yy;
                                let line = &chan[(y * gr.stride + u * gr.dilation) * pw..][..pw];
                                let start = v * gc.dilation;
                                if gc.stride == 1 {
                                    dst_row.copy_from_slice(&line[start..start + ow]);
                                } else {
                                    for (d, s) in dst_row
                                        .iter_mut()
                                        .zip(line[start..].iter().step_by(gc.stride))
                                    {
                                        *d = *s;
                                    }
                                }
                            }
                        }
                    }
                }
                prod.clear();
                prod.resize(n * m, 0.0f32);
                let a = ArrayView2::from_shape((n, kk), weights).expect("n × kk weights");
                let b = ArrayView2::from_shape((kk, m), &cols[..]).expect("kk × m columns");
                let mut c =
                    ArrayViewMut2::from_shape((n, m), &mut prod[..]).expect("n × m product");
                // Single-threaded sgemm (matrixmultiply, through ndarray); with
                // beta 0 the product's old contents are not read.
                general_mat_mul(1.0, &a, &b, 0.0, &mut c);
                for (k, (to, from)) in dst.iter_mut().zip(prod.chunks_exact(m)).enumerate() {
                    let (scale, bias) = (st.kernels[k].scale, st.kernels[k].bias);
                    if scale != 1.0 || bias != 0.0 {
                        for (o, v) in to.iter_mut().zip(from) {
                            *o = *v * scale + bias;
                        }
                    } else {
                        to.copy_from_slice(from);
                    }
                }
            },
        );
        // The scratch goes back for the next run.
        bufs.give(padded_buf);
    }
}
