//! The separable strategy, for kernels whose every plane has rank 1, t = u·vᵀ
//! (Szeliski 2010, §3.2.1): pad once, then a horizontal 1-D pass with v over every
//! padded row, then a vertical 1-D pass with u over the result:
//!
//! ```text
//! tmp[r][x]  = Σ_j v[j] · P[r][x·s_x + j·d_x]          for every padded row r
//! out[y][x] += Σ_i u[i] · tmp[y·s_y + i·d_y][x]         summed over planes
//! ```
//!
//! k_h + k_w multiply-adds per output and plane instead of k_h·k_w. Each output
//! is summed in a fixed order, so results do not depend on the thread count.

use rayon::prelude::*;

use crate::engine::{pad_input, PreparedStage, Strategy};

/// Horizontal then vertical 1-D passes for rank-1 kernels.
pub struct Separable;

impl Strategy for Separable {
    fn name(&self) -> &'static str {
        "separable"
    }

    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32]) {
        let (oh, ow) = (st.out_height, st.out_width);
        let plane_out = oh * ow;
        let (mut padded, mut tmp) = (Vec::new(), Vec::new());
        for (n, k) in st.kernels.iter().enumerate() {
            let factors = k
                .factors
                .as_ref()
                .expect("the planner chooses separable only for rank-1 kernels");
            let (gr, gc) = (k.geometry.rows, k.geometry.cols);
            let (ph, pw) = (gr.padded(), gc.padded());
            pad_input(st, &k.geometry, input, &mut padded);
            let dst = &mut out[n * plane_out..(n + 1) * plane_out];
            dst.fill(0.0);
            for (c, f) in factors.iter().enumerate() {
                let Some((u, v)) = f else { continue };
                let chan = &padded[c * ph * pw..(c + 1) * ph * pw];
                if tmp.capacity() < ph * ow {
                    tmp = crate::engine::fresh_buffer(ph * ow);
                }
                tmp.clear();
                tmp.resize(ph * ow, 0.0f32);
                tmp.par_chunks_mut(ow).enumerate().for_each(|(r, row)| {
                    let line = &chan[r * pw..(r + 1) * pw];
                    for (j, &t) in v.iter().enumerate() {
                        if t == 0.0 {
                            continue;
                        }
                        let start = j * gc.dilation;
                        if gc.stride == 1 {
                            crate::engine::simd::axpy(row, t, &line[start..start + ow]);
                        } else {
                            for (o, s) in
                                row.iter_mut().zip(line[start..].iter().step_by(gc.stride))
                            {
                                *o += t * s;
                            }
                        }
                    }
                });
                let tmp = &tmp[..];
                dst.par_chunks_mut(ow).enumerate().for_each(|(y, row)| {
                    for (i, &t) in u.iter().enumerate() {
                        if t == 0.0 {
                            continue;
                        }
                        let r = y * gr.stride + i * gr.dilation;
                        crate::engine::simd::axpy(row, t, &tmp[r * ow..(r + 1) * ow]);
                    }
                });
            }
            let (scale, bias) = (k.scale, k.bias);
            if scale != 1.0 || bias != 0.0 {
                dst.par_iter_mut().for_each(|o| *o = *o * scale + bias);
            }
        }
        // The scratch goes back for the next run on this thread.
        crate::engine::give_back(padded);
        crate::engine::give_back(tmp);
    }
}
