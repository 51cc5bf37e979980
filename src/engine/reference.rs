//! The reference strategy: for every output sample, a literal f64 sum over every
//! channel and tap, each input position looked up through the pad mode.
//! Slow and obviously right; it defines what the fast strategies must compute.

use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::engine::Strategy;

/// Per-pixel sums with a border lookup per tap.
pub(crate) struct Reference;

impl Strategy for Reference {
    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32], _bufs: &Buffers) {
        let (h, w) = (st.height, st.width);
        let plane_out = st.out_height * st.out_width;
        for (n, k) in st.kernels.iter().enumerate() {
            let (gr, gc) = (k.geometry.rows, k.geometry.cols);
            for oy in 0..st.out_height {
                for ox in 0..st.out_width {
                    let mut acc = 0.0f64;
                    for c in 0..st.channels {
                        for u in 0..k.rows {
                            let y = (oy * gr.stride + u * gr.dilation) as isize
                                - gr.pad_before as isize;
                            let Some(sy) = st.pad.source(y, h) else {
                                continue;
                            };
                            for v in 0..k.cols {
                                let x = (ox * gc.stride + v * gc.dilation) as isize
                                    - gc.pad_before as isize;
                                let Some(sx) = st.pad.source(x, w) else {
                                    continue;
                                };
                                let t = k.taps[(c * k.rows + u) * k.cols + v] as f64;
                                acc += t * input[(c * h + sy) * w + sx] as f64;
                            }
                        }
                    }
                    out[n * plane_out + oy * st.out_width + ox] =
                        (acc * k.scale as f64 + k.bias as f64) as f32;
                }
            }
        }
    }
}
