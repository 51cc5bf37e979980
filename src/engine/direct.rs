//! The direct strategy: pad each input channel once into a scratch buffer (so the
//! inner loops never test bounds), then build each output row as a sum of whole
//! input-row segments, one multiply-add over contiguous memory per tap:
//!
//! ```text
//! row_out[x] += t[c][u][v] · P_c[y·s_y + u·d_y][x·s_x + v·d_x]   for x in 0..out_width
//! ```
//!
//! With stride 1 along x the segment is contiguous and the compiler vectorises the
//! loop. Zero taps are skipped. Output rows are independent, so bands of rows run
//! in parallel; each output sample is summed in the same order whatever the
//! thread count, so results do not depend on it.

use rayon::prelude::*;

use crate::engine::{pad_input, PreparedKernel, PreparedStage, Strategy};

/// Padded rows, whole-row multiply-adds per tap.
pub struct Direct;

/// Rows per parallel task: enough work per task to hide scheduling costs.
fn band_rows(out_width: usize, taps: usize) -> usize {
    let per_row = (out_width * taps).max(1);
    (32_768 / per_row).clamp(1, 64)
}

impl Strategy for Direct {
    fn name(&self) -> &'static str {
        "direct"
    }

    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32]) {
        let plane_out = st.out_height * st.out_width;
        // Kernels with the same padding share one padded copy of the input.
        let mut padded: Vec<f32> = Vec::new();
        let mut padded_for: Option<(usize, usize, usize, usize)> = None;
        for (n, k) in st.kernels.iter().enumerate() {
            let (gr, gc) = (k.geometry.rows, k.geometry.cols);
            let pads = (gr.pad_before, gr.pad_after, gc.pad_before, gc.pad_after);
            let (ph, pw) = (gr.padded(), gc.padded());
            if padded_for != Some(pads) {
                pad_input(st, &k.geometry, input, &mut padded);
                padded_for = Some(pads);
            }
            let dst = &mut out[n * plane_out..(n + 1) * plane_out];
            let band = band_rows(st.out_width, k.taps.len());
            let src = &padded[..];
            dst.par_chunks_mut(band * st.out_width)
                .enumerate()
                .for_each(|(b, rows)| {
                    for (r, row) in rows.chunks_exact_mut(st.out_width).enumerate() {
                        conv_row(k, st.channels, src, (ph, pw), b * band + r, row);
                    }
                });
        }
    }
}

/// Computes output row `oy` of one kernel from the padded channels `src`
/// (`channels × ph × pw`).
fn conv_row(
    k: &PreparedKernel,
    channels: usize,
    src: &[f32],
    (ph, pw): (usize, usize),
    oy: usize,
    row: &mut [f32],
) {
    let (gr, gc) = (k.geometry.rows, k.geometry.cols);
    let ow = row.len();
    let (sx, dx) = (gc.stride, gc.dilation);
    row.fill(0.0);
    for c in 0..channels {
        let chan = &src[c * ph * pw..(c + 1) * ph * pw];
        for u in 0..k.rows {
            let y = oy * gr.stride + u * gr.dilation;
            let line = &chan[y * pw..(y + 1) * pw];
            let taps = &k.taps[(c * k.rows + u) * k.cols..(c * k.rows + u + 1) * k.cols];
            for (v, &t) in taps.iter().enumerate() {
                if t == 0.0 {
                    continue;
                }
                let start = v * dx;
                if sx == 1 {
                    let seg = &line[start..start + ow];
                    for (o, s) in row.iter_mut().zip(seg) {
                        *o += t * s;
                    }
                } else {
                    let seg = &line[start..start + (ow - 1) * sx + 1];
                    for (o, s) in row.iter_mut().zip(seg.iter().step_by(sx)) {
                        *o += t * s;
                    }
                }
            }
        }
    }
    let (scale, bias) = (k.scale, k.bias);
    if scale != 1.0 || bias != 0.0 {
        row.iter_mut().for_each(|o| *o = *o * scale + bias);
    }
}
