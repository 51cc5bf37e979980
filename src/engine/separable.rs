//! The separable strategy, for kernels whose every plane has rank 1, t = u·vᵀ
//! (Szeliski 2010, §3.2.1): a horizontal 1-D pass with v over padded rows, then a
//! vertical 1-D pass with u over the result:
//!
//! ```text
//! tmp[r][x]  = Σ_j v[j] · P[r][x·s_x + j·d_x]          for every padded row r
//! out[y][x] += Σ_i u[i] · tmp[y·s_y + i·d_y][x]         summed over planes
//! ```
//!
//! k_h + k_w multiply-adds per output and plane instead of k_h·k_w. Output rows
//! go in bands: each band pads just the input rows it reads and runs both passes
//! for every kernel of the bank on them while they are in cache, so neither a
//! padded copy of the image nor a whole intermediate image is ever made. Each
//! output is summed in a fixed order, so results do not depend on the thread
//! count.

use crate::engine::bands::{for_each_band, Band};
use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::engine::simd::axpy;
use crate::engine::Strategy;

/// Horizontal then vertical 1-D passes for rank-1 kernels.
pub(crate) struct Separable;

/// Output rows per band: about 32, fewer for very wide rows.
fn band_rows(out_width: usize) -> usize {
    (262_144 / out_width.max(1)).clamp(4, 32)
}

impl Strategy for Separable {
    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32], _bufs: &Buffers) {
        let ow = st.out_width;
        for_each_band(
            st,
            input,
            out,
            |_| band_rows(ow),
            Vec::new,
            |tmp, group, band, rows, pw, dst| {
                for (&n, plane_rows) in group.iter().zip(dst.iter_mut()) {
                    kernel_band(st, n, band, rows, pw, tmp, plane_rows);
                }
            },
        );
    }
}

/// Output rows [band.o0, band.o1) of kernel `n` from the band's padded rows,
/// into `dst` (those rows of the kernel's plane).
fn kernel_band(
    st: &PreparedStage,
    n: usize,
    band: Band,
    rows: &[f32],
    pw: usize,
    tmp: &mut Vec<f32>,
    dst: &mut [f32],
) {
    let ow = st.out_width;
    let k = &st.kernels[n];
    let factors = k
        .factors
        .as_ref()
        .expect("the planner chooses separable only for rank-1 kernels");
    let (gr, gc) = (k.geometry.rows, k.geometry.cols);
    dst.fill(0.0);
    for (c, f) in factors.iter().enumerate() {
        let Some((u, v)) = f else { continue };
        let chan = &rows[c * band.rows * pw..(c + 1) * band.rows * pw];
        tmp.clear();
        tmp.resize(band.rows * ow, 0.0f32);
        for (line, row) in chan.chunks_exact(pw).zip(tmp.chunks_exact_mut(ow)) {
            for (j, &t) in v.iter().enumerate() {
                if t == 0.0 {
                    continue;
                }
                let start = j * gc.dilation;
                if gc.stride == 1 {
                    axpy(row, t, &line[start..start + ow]);
                } else {
                    for (o, s) in row.iter_mut().zip(line[start..].iter().step_by(gc.stride)) {
                        *o += t * s;
                    }
                }
            }
        }
        for (i, row) in dst.chunks_exact_mut(ow).enumerate() {
            for (j, &t) in u.iter().enumerate() {
                if t == 0.0 {
                    continue;
                }
                let r = i * gr.stride + j * gr.dilation;
                axpy(row, t, &tmp[r * ow..(r + 1) * ow]);
            }
        }
    }
    let (scale, bias) = (k.scale, k.bias);
    if scale != 1.0 || bias != 0.0 {
        dst.iter_mut().for_each(|o| *o = *o * scale + bias);
    }
}
