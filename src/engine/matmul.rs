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
//! The product uses the `matrixmultiply` crate's single-threaded sgemm; bands run
//! in parallel on the rayon pool, each with its own column buffer of bounded
//! size, so no matrix library starts threads of its own. Band sizes do not depend
//! on the thread count, so neither do the results. All kernels must share one
//! size and padding (the planner checks).

use rayon::prelude::*;

use crate::engine::{pad_input, OutPtr, PreparedStage, Strategy};

/// Image-to-columns in row bands, then a matrix product per band.
pub struct Matmul;

/// Output samples per band: enough columns for an efficient product, few
/// enough that the column buffer (K × this) stays in cache.
const BAND_COLUMNS: usize = 2048;

impl Strategy for Matmul {
    fn name(&self) -> &'static str {
        "matmul"
    }

    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32]) {
        let k0 = &st.kernels[0];
        let (gr, gc) = (k0.geometry.rows, k0.geometry.cols);
        let (ph, pw) = (gr.padded(), gc.padded());
        let (kh, kw, c) = (k0.rows, k0.cols, st.channels);
        let kk = c * kh * kw;
        let (oh, ow) = (st.out_height, st.out_width);
        let n = st.kernels.len();
        let mut padded_buf = Vec::new();
        pad_input(st, &k0.geometry, input, &mut padded_buf);
        let weights: Vec<f32> = st
            .kernels
            .iter()
            .flat_map(|k| k.taps.iter().copied())
            .collect();
        let band = (BAND_COLUMNS / ow.max(1)).clamp(1, oh.max(1));
        let bands = oh.div_ceil(band);
        assert!(out.len() >= n * oh * ow);
        let dst = OutPtr(out.as_mut_ptr());
        let padded = &padded_buf[..];
        let weights = &weights[..];
        (0..bands)
            .into_par_iter()
            .for_each_init(Vec::new, |cols, b| {
                let y0 = b * band;
                let y1 = (y0 + band).min(oh);
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
                // SAFETY: `weights` is n × kk, `cols` is kk × m, and the destination
                // block starts at row y0 of kernel 0's plane with a row stride of one
                // plane (oh·ow), n rows of m contiguous samples: inside `out`, and
                // disjoint from every other band's block.
                unsafe {
                    matrixmultiply::sgemm(
                        n,
                        kk,
                        m,
                        1.0,
                        weights.as_ptr(),
                        kk as isize,
                        1,
                        cols.as_ptr(),
                        m as isize,
                        1,
                        0.0,
                        dst.at(y0 * ow),
                        (oh * ow) as isize,
                        1,
                    );
                }
            });
        for (k, plane) in st.kernels.iter().zip(out.chunks_exact_mut(oh * ow)) {
            if k.scale != 1.0 || k.bias != 0.0 {
                plane
                    .par_iter_mut()
                    .for_each(|o| *o = *o * k.scale + k.bias);
            }
        }
        // The scratch goes back for the next run on this thread.
        crate::engine::give_back(padded_buf);
    }
}
