//! conv → act → pool fused in bands of pooled rows, so that the conv map is
//! never held whole. Pooled rows [q0, q1) with pool window k_p and stride s_p
//! read conv rows [q0·s_p, (q1 − 1)·s_p + k_p), which read padded input rows
//! [r0·s, (r1 − 1)·s + k_eff) (Dumoulin & Visin 2016, relationship 15, for the
//! conv and for the pool): each band pads just those input rows, computes just
//! those conv rows (rows shared by two bands' windows are computed by both) and
//! pools them straight into its rows of the output.
//!
//! Every output sample is computed exactly as the unfused path computes it, so
//! the result is bit-identical to the conv stage, then the activation, then the
//! pool (the fusion test checks this for every strategy that bands).

use ndarray::{Array3, ArrayView3};
use rayon::prelude::*;

use crate::engine::bands::{pad_band, row_bands, Band};
use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::engine::{run_strategy, Engine};
use crate::error::Error;
use crate::stage::{Activation, Pool, PoolWindow};

/// Whether [`run_pooled`] can band this stage with this pool under the chosen
/// strategy `engine`: not for kernels of different padding, a global pool, or
/// the FFT strategy (whose tiles are planned over the whole image).
pub(crate) fn fusable(prepared: &PreparedStage, engine: Engine, pool: &Pool) -> bool {
    let g = prepared.kernels[0].geometry;
    engine != Engine::Fft
        && !matches!(pool.window, PoolWindow::Global)
        && prepared.kernels.iter().all(|k| k.geometry == g)
}

/// Runs a prepared conv stage with the chosen strategy `engine`, then `act`,
/// then a sized `pool`, in bands (see the module header). The caller checks
/// [`fusable`] first.
pub(crate) fn run_pooled(
    prepared: &PreparedStage,
    input: ArrayView3<f32>,
    engine: Engine,
    act: Option<Activation>,
    pool: &Pool,
    bufs: &Buffers,
) -> Result<Array3<f32>, Error> {
    let g = prepared.kernels[0].geometry;
    let (c, h, w) = input.dim();
    if (c, h, w) != (prepared.channels, prepared.height, prepared.width) {
        return Err(Error::shape(format!(
            "stage prepared for {}×{}×{} but given {c}×{h}×{w}",
            prepared.channels, prepared.height, prepared.width
        )));
    }
    let (oh, ow) = (prepared.out_height, prepared.out_width);
    let (qh, qw) = pool.output_size(oh, ow)?;
    let ((kh, _), (sh, _)) = pool.window_over(oh, ow);
    let contiguous = input.as_standard_layout();
    let data = contiguous.as_slice().expect("standard layout");
    let pw = g.cols.padded();
    let ekh = g.rows.effective_kernel();
    let sy = g.rows.stride;
    let n = prepared.kernels.len();
    // About 32 conv rows a band: enough work per task, little recomputed overlap.
    let per_band = (32 / sh).max(1);
    let ranges: Vec<(usize, usize)> = (0..qh)
        .step_by(per_band)
        .map(|q0| (q0, (q0 + per_band).min(qh)))
        .collect();
    // Every pooled sample is written by exactly one band.
    let mut out = bufs.scratch(n * qh * qw);
    let kernels: Vec<usize> = (0..n).collect();
    let dsts = row_bands(&mut out, qh * qw, qw, &kernels, &ranges);
    ranges
        .par_iter()
        .zip(dsts)
        .try_for_each(|(&(q0, q1), mut dst)| -> Result<(), Error> {
            // Conv rows [r0, r1) feed pooled rows [q0, q1); padded rows [p0, p1) feed them.
            let (r0, r1) = (q0 * sh, (q1 - 1) * sh + kh);
            let (p0, p1) = (r0 * sy, (r1 - 1) * sy + ekh);
            let bh = p1 - p0;
            // Just the padded rows this band reads (no padded copy of the image).
            let mut band_in = bufs.take(c * bh * pw);
            let rows = Band {
                o0: r0,
                o1: r1,
                p0,
                rows: bh,
            };
            pad_band(prepared, 0, data, rows, &mut band_in);
            // The band as a stage of its own: its padded rows, no further padding.
            let mut band = prepared.clone();
            band.height = bh;
            band.width = pw;
            band.out_height = r1 - r0;
            for k in &mut band.kernels {
                k.geometry.rows.input = bh;
                k.geometry.rows.pad_before = 0;
                k.geometry.rows.pad_after = 0;
                k.geometry.rows.output = r1 - r0;
                k.geometry.cols.input = pw;
                k.geometry.cols.pad_before = 0;
                k.geometry.cols.pad_after = 0;
            }
            let mut conv = bufs.scratch(n * (r1 - r0) * ow);
            run_strategy(engine, &band, &band_in, &mut conv, bufs);
            bufs.give(band_in);
            if let Some(a) = act {
                a.apply(&mut conv);
            }
            // Bands already run in parallel: each map's rows are pooled in turn,
            // straight into this band's rows of the output.
            for (k, to) in dst.iter_mut().enumerate() {
                let map = &conv[k * (r1 - r0) * ow..(k + 1) * (r1 - r0) * ow];
                pool.pool_map(map, ow, to, qw);
            }
            bufs.give(conv);
            Ok(())
        })?;
    Ok(Array3::from_shape_vec((n, qh, qw), out).expect("sized from the pool's output"))
}
