//! The direct strategy: output rows in bands; each band copies just the padded
//! input rows it reads into a small buffer (pad mode applied there, so the inner
//! loops never test bounds and the whole image is never copied), then builds
//! each output row, for every kernel of the bank in turn while those rows are in
//! cache, as a sum of whole input-row segments, one multiply-add over contiguous
//! memory per tap:
//!
//! ```text
//! row_out[x] += t[c][u][v] · P_c[y·s_y + u·d_y][x·s_x + v·d_x]   for x in 0..out_width
//! ```
//!
//! With stride 1 along x the segment is contiguous and runs as vectors (8 lanes
//! with AVX2 where the CPU has it, see `simd`). Zero taps are skipped. Bands run
//! in parallel; each output sample is summed in the same order whatever the
//! thread count, so results do not depend on it.

use crate::engine::bands::for_each_band;
use crate::engine::buffers::Buffers;
use crate::engine::prepared::{PreparedKernel, PreparedStage};
use crate::engine::Strategy;

/// Padded rows, whole-row multiply-adds per tap.
pub(crate) struct Direct;

/// Rows per parallel task: enough work per task to hide scheduling costs, few
/// enough that the input rows a band reads stay in cache across its kernels.
fn band_rows(out_width: usize, taps: usize) -> usize {
    let per_row = (out_width * taps).max(1);
    // At least 8 rows, so that the rows above and below a band that it pads
    // for its taps are a small share of what it pads.
    (65_536 / per_row).clamp(8, 32)
}

impl Strategy for Direct {
    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32], _bufs: &Buffers) {
        let ow = st.out_width;
        // Each band of output rows pads just the input rows it reads and is
        // computed for every kernel of its pad group in turn, while those rows
        // are still in cache.
        let taps = |group: &[usize]| group.iter().map(|&n| st.kernels[n].taps.len()).sum();
        for_each_band(
            st,
            input,
            out,
            |group| band_rows(ow, taps(group)),
            || (),
            |_, group, band, rows, pw, dst| {
                for (&n, plane_rows) in group.iter().zip(dst.iter_mut()) {
                    for (i, row) in plane_rows.chunks_exact_mut(ow).enumerate() {
                        conv_row(&st.kernels[n], st.channels, rows, (band.rows, pw), i, row);
                    }
                }
            },
        );
    }
}

/// Computes output row `oy` of one kernel from the padded channels `src`
/// (`channels × ph × pw`), with the widest vectors this CPU has (see `simd`;
/// both copies do the same operations, so the bits agree).
fn conv_row(
    k: &PreparedKernel,
    channels: usize,
    src: &[f32],
    dims: (usize, usize),
    oy: usize,
    row: &mut [f32],
) {
    #[cfg(target_arch = "x86_64")]
    if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        return unsafe { conv_row_avx2(k, channels, src, dims, oy, row) };
    }
    conv_row_body(k, channels, src, dims, oy, row)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn conv_row_avx2(
    k: &PreparedKernel,
    channels: usize,
    src: &[f32],
    dims: (usize, usize),
    oy: usize,
    row: &mut [f32],
) {
    conv_row_body(k, channels, src, dims, oy, row)
}

/// Output samples summed together in registers before they are stored.
const CHUNK: usize = 64;

#[inline(always)]
fn conv_row_body(
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
    // Where tap (c, u, v) reads its row segment: every nonzero tap in the order
    // c, u, v, the order every output sample is summed in.
    let taps = (0..channels).flat_map(|c| {
        (0..k.rows).flat_map(move |u| {
            let base = c * ph * pw + (oy * gr.stride + u * gr.dilation) * pw;
            (0..k.cols).filter_map(move |v| {
                let t = k.taps[(c * k.rows + u) * k.cols + v];
                (t != 0.0).then_some((base + v * dx, t))
            })
        })
    });
    if sx == 1 {
        // Chunks of the row summed over all taps in registers, then stored once.
        let mut x0 = 0;
        while x0 + CHUNK <= ow {
            let mut acc = [0.0f32; CHUNK];
            for (off, t) in taps.clone() {
                let seg = &src[off + x0..off + x0 + CHUNK];
                for (a, s) in acc.iter_mut().zip(seg) {
                    *a += t * s;
                }
            }
            row[x0..x0 + CHUNK].copy_from_slice(&acc);
            x0 += CHUNK;
        }
        if x0 < ow {
            let n = ow - x0;
            let mut acc = [0.0f32; CHUNK];
            for (off, t) in taps {
                let seg = &src[off + x0..off + x0 + n];
                for (a, s) in acc[..n].iter_mut().zip(seg) {
                    *a += t * s;
                }
            }
            row[x0..].copy_from_slice(&acc[..n]);
        }
    } else {
        row.fill(0.0);
        for (off, t) in taps {
            let seg = &src[off..off + (ow - 1) * sx + 1];
            for (o, s) in row.iter_mut().zip(seg.iter().step_by(sx)) {
                *o += t * s;
            }
        }
    }
    let (scale, bias) = (k.scale, k.bias);
    if scale != 1.0 || bias != 0.0 {
        row.iter_mut().for_each(|o| *o = *o * scale + bias);
    }
}
