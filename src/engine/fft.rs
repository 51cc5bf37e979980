//! The FFT strategy, for large kernels that are not rank 1: its cost hardly grows
//! with the number of taps.
//!
//! The input is padded by the stage's pad mode first (so borders mean exactly what
//! they mean for every other strategy). The padded channel P is then cut into
//! overlapping tiles of T_h × T_w samples (overlap-save; Oppenheim & Schafer,
//! *Discrete-Time Signal Processing*, 3rd ed., §8.7.3, from memory). For a tile Q
//! and a kernel K (dilation applied by spacing its taps) placed at the origin of
//! a T_h × T_w array of zeros, the circular cross-correlation
//!
//! ```text
//! C[y][x] = Σ_u Σ_v Q[(y+u) mod T_h][(x+v) mod T_w] · K[u][v]  =  IDFT( DFT(Q) · conj(DFT(K)) )
//! ```
//!
//! (the correlation theorem, ibid. §8.6.7) equals the linear correlation for
//! y ≤ T_h − k_eff and x ≤ T_w − k_eff, where nothing wraps. Each tile therefore
//! gives (T − k_eff + 1)² outputs at stride 1, and tiles step by that much; larger
//! strides keep every s-th output. Channels add up in the frequency domain, so
//! each kernel needs one inverse transform per tile whatever the channel count.
//! The tile size is the one with the least estimated work (tiles × T log T per
//! axis) among sizes whose prime factors are at most 7, up to the whole padded
//! image.
//!
//! Transforms are f64 (realfft/rustfft): their rounding error grows like log T,
//! and f64 keeps it far below the f32 result's own rounding. Rows of tiles run in
//! parallel; every output is computed by one tile in a fixed order, so results do
//! not depend on the thread count.

use std::sync::Arc;

use rayon::prelude::*;
use realfft::num_complex::Complex64;
use realfft::{ComplexToReal, RealFftPlanner, RealToComplex};
use rustfft::{Fft as ComplexFft, FftPlanner};

use crate::engine::bands::{pad_input, row_bands};
use crate::engine::buffers::Buffers;
use crate::engine::prepared::{Geometry, PreparedKernel, PreparedStage};
use crate::engine::Strategy;

/// Large non-separable kernels through the DFT.
pub(crate) struct Fft;

/// The smallest n' ≥ n whose prime factors are all ≤ 7.
pub(crate) fn fast_size(n: usize) -> usize {
    let mut m = n.max(1);
    loop {
        let mut r = m;
        for p in [2, 3, 5, 7] {
            while r % p == 0 {
                r /= p;
            }
        }
        if r == 1 {
            return m;
        }
        m += 1;
    }
}

/// The tile side along one axis for an effective kernel extent `ek` over `padded`
/// samples: the fast size with the least estimated work, tiles × T·log2 T.
pub(crate) fn tile_side(ek: usize, padded: usize) -> usize {
    let whole = fast_size(padded);
    let valid = padded + 1 - ek;
    let cost = |t: usize| {
        let tiles = valid.div_ceil(t + 1 - ek);
        tiles as f64 * t as f64 * (t as f64).log2().max(1.0)
    };
    let mut best = whole;
    let mut t = fast_size((2 * ek).max(16));
    while t < whole {
        if cost(t) < cost(best) {
            best = t;
        }
        t = fast_size(t + t / 4 + 1);
    }
    best
}

type Spectrum = Vec<Complex64>;

/// Transform plans for one tile size: rows real↔complex, columns complex.
struct Plans {
    th: usize,
    tw: usize,
    /// Complex bins per row after the real transform: tw/2 + 1.
    wc: usize,
    row_fwd: Arc<dyn RealToComplex<f64>>,
    row_inv: Arc<dyn ComplexToReal<f64>>,
    col_fwd: Arc<dyn ComplexFft<f64>>,
    col_inv: Arc<dyn ComplexFft<f64>>,
}

/// Per-task buffers, reused from tile to tile.
struct Scratch {
    line: Vec<f64>,
    rows: Spectrum,
    real: Spectrum,
    cols: Spectrum,
}

const ZERO: Complex64 = Complex64::new(0.0, 0.0);

impl Plans {
    fn new(th: usize, tw: usize) -> Self {
        let mut real = RealFftPlanner::<f64>::new();
        let mut complex = FftPlanner::<f64>::new();
        Plans {
            th,
            tw,
            wc: tw / 2 + 1,
            row_fwd: real.plan_fft_forward(tw),
            row_inv: real.plan_fft_inverse(tw),
            col_fwd: complex.plan_fft_forward(th),
            col_inv: complex.plan_fft_inverse(th),
        }
    }

    fn scratch(&self) -> Scratch {
        let real = self
            .row_fwd
            .get_scratch_len()
            .max(self.row_inv.get_scratch_len());
        let cols = self
            .col_fwd
            .get_inplace_scratch_len()
            .max(self.col_inv.get_inplace_scratch_len());
        Scratch {
            line: vec![0.0; self.tw],
            rows: vec![ZERO; self.th * self.wc],
            real: vec![ZERO; real],
            cols: vec![ZERO; cols],
        }
    }

    /// The 2-D DFT of a th × tw real array whose row y `fill` writes into a zeroed
    /// line (returning false for an all-zero row), into `out` transposed: wc rows
    /// of th bins.
    fn forward(
        &self,
        s: &mut Scratch,
        out: &mut [Complex64],
        fill: impl Fn(usize, &mut [f64]) -> bool,
    ) {
        for (y, dst) in s.rows.chunks_exact_mut(self.wc).enumerate() {
            s.line.fill(0.0);
            if fill(y, &mut s.line) {
                self.row_fwd
                    .process_with_scratch(&mut s.line, dst, &mut s.real)
                    .expect("buffer sizes match the plan");
            } else {
                dst.fill(ZERO);
            }
        }
        transpose_into(&s.rows, self.th, self.wc, out);
        for col in out.chunks_exact_mut(self.th) {
            self.col_fwd.process_with_scratch(col, &mut s.cols);
        }
    }

    /// Inverse of [`Plans::forward`] for the rows `want` asks for: `spec` (wc × th,
    /// destroyed) → calls `take(y, samples)` with row y of the real result, unscaled.
    fn inverse(
        &self,
        s: &mut Scratch,
        spec: &mut [Complex64],
        want: impl Fn(usize) -> bool,
        mut take: impl FnMut(usize, &[f64]),
    ) {
        for col in spec.chunks_exact_mut(self.th) {
            self.col_inv.process_with_scratch(col, &mut s.cols);
        }
        transpose_into(spec, self.wc, self.th, &mut s.rows);
        for (y, row) in s.rows.chunks_exact_mut(self.wc).enumerate() {
            if !want(y) {
                continue;
            }
            // A real signal's spectrum has real first (and, for even lengths,
            // last) bins; make them exactly so after rounding.
            row[0].im = 0.0;
            if self.tw % 2 == 0 {
                row[self.wc - 1].im = 0.0;
            }
            self.row_inv
                .process_with_scratch(row, &mut s.line, &mut s.real)
                .expect("buffer sizes match the plan");
            take(y, &s.line);
        }
    }
}

/// `out` = transpose of the rows × cols array `a`, in cache-sized blocks.
fn transpose_into(a: &[Complex64], rows: usize, cols: usize, out: &mut [Complex64]) {
    const B: usize = 16;
    for i0 in (0..rows).step_by(B) {
        for j0 in (0..cols).step_by(B) {
            for i in i0..(i0 + B).min(rows) {
                for j in j0..(j0 + B).min(cols) {
                    out[j * rows + i] = a[i * cols + j];
                }
            }
        }
    }
}

impl Strategy for Fft {
    fn run(&self, st: &PreparedStage, input: &[f32], out: &mut [f32], bufs: &Buffers) {
        // Kernels with the same geometry share the input's tiles and transforms.
        let mut done = vec![false; st.kernels.len()];
        let mut padded = Vec::new();
        for n0 in 0..st.kernels.len() {
            if done[n0] {
                continue;
            }
            let g = st.kernels[n0].geometry;
            let group: Vec<usize> = (n0..st.kernels.len())
                .filter(|&n| !done[n] && st.kernels[n].geometry == g)
                .collect();
            pad_input(st, &g, input, &mut padded, bufs);
            run_group(st, &g, &padded, &group, out);
            for n in group {
                done[n] = true;
            }
        }
        // The scratch goes back for the next run.
        bufs.give(padded);
    }
}

fn run_group(st: &PreparedStage, g: &Geometry, padded: &[f32], group: &[usize], out: &mut [f32]) {
    let (ph, pw) = (g.rows.padded(), g.cols.padded());
    let (ekh, ekw) = (g.rows.effective_kernel(), g.cols.effective_kernel());
    let plans = Plans::new(tile_side(ekh, ph), tile_side(ekw, pw));
    let (th, tw, wc) = (plans.th, plans.tw, plans.wc);
    // Stride-1 outputs, and how far each tile steps.
    let (vh, vw) = (ph + 1 - ekh, pw + 1 - ekw);
    let (step_h, step_w) = (th + 1 - ekh, tw + 1 - ekw);
    let (sy, sx) = (g.rows.stride, g.cols.stride);
    let (oh, ow) = (st.out_height, st.out_width);
    let norm = 1.0 / (th * tw) as f64;
    let channels = st.channels;

    // Kernel spectra at the tile size, per kernel and channel.
    let kernel_specs: Vec<Vec<Spectrum>> = group
        .par_iter()
        .map(|&n| {
            let k = &st.kernels[n];
            let mut s = plans.scratch();
            (0..channels)
                .map(|c| {
                    let mut spec = vec![ZERO; wc * th];
                    plans.forward(&mut s, &mut spec, |y, line| kernel_row(k, c, g, y, line));
                    spec
                })
                .collect()
        })
        .collect();

    // Tile row ty owns stride-1 rows [y0, y0 + step_h) ∩ [0, vh), so the output
    // rows on the stride within them, [ceil(y0/s), ceil(min(y0 + step_h, vh)/s)):
    // disjoint bands of every kernel's plane.
    let tile_rows = vh.div_ceil(step_h);
    let ranges: Vec<(usize, usize)> = (0..tile_rows)
        .map(|ty| {
            let y0 = ty * step_h;
            (y0.div_ceil(sy), (y0 + step_h).min(vh).div_ceil(sy))
        })
        .collect();
    let dsts = row_bands(out, oh * ow, ow, group, &ranges);
    (0..tile_rows)
        .into_par_iter()
        .zip(dsts)
        .for_each(|(ty, mut dst)| {
            let y0 = ty * step_h;
            let first_row = ranges[ty].0;
            let mut s = plans.scratch();
            let mut specs: Vec<Spectrum> = vec![vec![ZERO; wc * th]; channels];
            let mut acc: Spectrum = vec![ZERO; wc * th];
            for tx in 0..vw.div_ceil(step_w) {
                let x0 = tx * step_w;
                for (c, spec) in specs.iter_mut().enumerate() {
                    let chan = &padded[c * ph * pw..(c + 1) * ph * pw];
                    plans.forward(&mut s, spec, |y, line| {
                        if y0 + y >= ph {
                            return false;
                        }
                        let row = &chan[(y0 + y) * pw..(y0 + y + 1) * pw];
                        let x1 = (x0 + tw).min(pw);
                        for (d, v) in line.iter_mut().zip(&row[x0..x1]) {
                            *d = *v as f64;
                        }
                        true
                    });
                }
                for (i, &n) in group.iter().enumerate() {
                    let k = &st.kernels[n];
                    acc.fill(ZERO);
                    for (spec, kspec) in specs.iter().zip(&kernel_specs[i]) {
                        for ((a, s), t) in acc.iter_mut().zip(spec).zip(kspec) {
                            *a += s * t.conj();
                        }
                    }
                    // Stride-1 row y0 + y is an output row when it is valid, inside
                    // this tile's step, and on the stride.
                    let wanted = |y: usize| y < step_h && y0 + y < vh && (y0 + y) % sy == 0;
                    let (scale, bias) = (k.scale as f64, k.bias as f64);
                    let plane = &mut dst[i];
                    plans.inverse(&mut s, &mut acc, wanted, |y, real| {
                        let oy = (y0 + y) / sy - first_row;
                        let row = &mut plane[oy * ow..(oy + 1) * ow];
                        let first = x0.div_ceil(sx);
                        for (ox, o) in row.iter_mut().enumerate().skip(first) {
                            let x = ox * sx - x0;
                            if x >= step_w {
                                break;
                            }
                            *o = (scale * real[x] * norm + bias) as f32;
                        }
                    });
                }
            }
        });
}

/// Row y of kernel `k`'s channel `c` with its taps spaced by the dilation,
/// written into a zeroed line; false when the row is all zeros.
fn kernel_row(k: &PreparedKernel, c: usize, g: &Geometry, y: usize, line: &mut [f64]) -> bool {
    let (dy, dx) = (g.rows.dilation, g.cols.dilation);
    if y % dy != 0 || y / dy >= k.rows {
        return false;
    }
    let taps = &k.taps[(c * k.rows + y / dy) * k.cols..][..k.cols];
    for (v, t) in taps.iter().enumerate() {
        line[v * dx] = *t as f64;
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fast_sizes_have_small_prime_factors() {
        assert_eq!(fast_size(1), 1);
        assert_eq!(fast_size(11), 12);
        assert_eq!(fast_size(2078), 2100);
        assert_eq!(fast_size(1031), 1050);
        // A tile never exceeds the whole padded image, and always holds the kernel.
        for (ek, padded) in [(31, 2078), (3, 10), (9, 9), (61, 4156), (7, 64)] {
            let t = tile_side(ek, padded);
            assert!(t >= ek && t <= fast_size(padded), "{ek} {padded}: {t}");
        }
    }

    #[test]
    fn the_oracle_tests_larger_images_cut_into_several_tiles() {
        // The (height, kernel rows, dilation) of the multi-tile cases that
        // `fft_tiles_equal_the_oracle_on_larger_images` checks against the oracle.
        for (h, kh, d) in [
            (150, 9, 1),
            (121, 7, 1),
            (97, 5, 3),
            (170, 11, 1),
            (200, 13, 1),
        ] {
            let ekh = d * (kh - 1) + 1;
            assert!(
                tile_side(ekh, h + ekh - 1) < fast_size(h + ekh - 1),
                "{h} rows, {kh}-tap kernel: one tile"
            );
        }
    }
}
