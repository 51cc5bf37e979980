//! Running combine and thin stages over whole maps (the definitions are in
//! [`crate::stage::combine`]).
//!
//! A combine writes into the buffer that holds the maps it reads: after them
//! when it keeps them (the conv step before it leaves room, see `Plan::build`),
//! over them when it drops them. Its outputs are made chunk by chunk of
//! pixels, all outputs of a chunk at once, so the conv maps are neither copied
//! nor read twice and no new buffer is taken (thin edges, which need whole
//! planes, are made plane by plane).

use ndarray::{Array3, ArrayView3};
use rayon::prelude::*;

use crate::engine::buffers::Buffers;
use crate::regions::{label, Connectivity};
use crate::stage::combine::{CombineKind, Gives, Resolved, ResolvedCombine};

/// Samples per parallel chunk of one output.
const CHUNK: usize = 1 << 14;

/// The combine's maps: `maps` (owned, standard layout) or the caller's input.
/// Gives the new maps, and the input maps' array when its memory was not used.
pub(crate) fn run_combine(
    r: &ResolvedCombine,
    maps: Option<Array3<f32>>,
    input: ArrayView3<f32>,
    bufs: &Buffers,
) -> (Array3<f32>, Option<Array3<f32>>) {
    let (c, h, w) = maps.as_ref().map_or(input.dim(), |m| m.dim());
    debug_assert_eq!(c, r.inputs);
    let plane = h * w;
    let n_out = r.outputs.len();
    let pointwise = !r
        .outputs
        .iter()
        .any(|o| matches!(o.kind, CombineKind::Thin { .. }));
    if !r.keep && !pointwise {
        let mut out = bufs.scratch(n_out * plane);
        {
            let x = maps.as_ref().map_or(input, |m| m.view());
            let standard = x.as_standard_layout();
            let ins = standard.as_slice().expect("standard layout");
            fill(&r.outputs, ins, &mut out, plane, w);
        }
        let a = Array3::from_shape_vec((n_out, h, w), out).expect("sized above");
        return (a, maps);
    }
    // The input maps' own buffer (the conv step left room after its maps for
    // kept ones), or a copy of the caller's input.
    let mut v = match maps {
        Some(m) if m.is_standard_layout() => {
            let (mut v, offset) = m.into_raw_vec_and_offset();
            if let Some(o) = offset.filter(|o| *o > 0) {
                v.drain(..o);
            }
            v.truncate(c * plane);
            v
        }
        other => {
            let x = other.as_ref().map_or(input, |m| m.view());
            let mut v = bufs.take(c.max(n_out) * plane + if r.keep { n_out * plane } else { 0 });
            v.clear();
            v.extend(x.iter());
            v
        }
    };
    let (planes, base) = if r.keep {
        (c + n_out, c)
    } else {
        (c.max(n_out), 0)
    };
    v.resize(planes * plane, 0.0);
    if pointwise {
        fill_in_place(&r.outputs, c, &mut v, plane, base);
    } else {
        let (ins, outs) = v.split_at_mut(c * plane);
        fill(&r.outputs, ins, outs, plane, w);
    }
    let kept = if r.keep { c + n_out } else { n_out };
    v.truncate(kept * plane);
    let a = Array3::from_shape_vec((kept, h, w), v).expect("sized above");
    (a, None)
}

/// The planes of one buffer, shared by the chunk tasks of [`fill_in_place`].
struct Planes {
    ptr: *mut f32,
    plane: usize,
}

// SAFETY: tasks touch disjoint sample ranges (see `fill_in_place`).
unsafe impl Sync for Planes {}

/// Pointwise outputs chunk by chunk, in the buffer that holds their sources:
/// input map `s` is plane `s` of `v`, output `j` goes to plane `base + j`
/// (after the inputs when they are kept, over them when they are not). Each
/// chunk's outputs are all made (into small buffers, an output reading the
/// ones before it from there) before any is written, so a source is read
/// while it is still in cache, and only once, and overwriting it is safe.
fn fill_in_place(ops: &[Resolved], n_in: usize, v: &mut [f32], plane: usize, base: usize) {
    let planes = Planes {
        ptr: v.as_mut_ptr(),
        plane,
    };
    let chunks = plane.div_ceil(CHUNK);
    (0..chunks).into_par_iter().for_each(|ci| {
        let at = ci * CHUNK;
        let len = CHUNK.min(plane - at);
        let planes = &planes;
        let mut made: Vec<Vec<f32>> = Vec::with_capacity(ops.len());
        for op in ops {
            let mut d = vec![0f32; len];
            {
                let src: Vec<&[f32]> = op
                    .sources
                    .iter()
                    .map(|&s| {
                        if s < n_in {
                            // SAFETY: plane s's samples [at, at + len) lie in
                            // the buffer, and no task writes them while this one
                            // reads: tasks own disjoint sample ranges, and this
                            // task writes only after every read below.
                            unsafe {
                                std::slice::from_raw_parts(
                                    planes.ptr.add(s * planes.plane + at),
                                    len,
                                )
                            }
                        } else {
                            made[s - n_in].as_slice()
                        }
                    })
                    .collect();
                chunk_of(op, &src, &mut d);
            }
            made.push(d);
        }
        for (j, d) in made.iter().enumerate() {
            // SAFETY: the range [at, at + len) of plane base + j belongs to
            // this task alone, and no slice of it is held any more.
            let dst = unsafe {
                std::slice::from_raw_parts_mut(planes.ptr.add((base + j) * planes.plane + at), len)
            };
            dst.copy_from_slice(d);
        }
    });
}

/// Computes every output in order into `outs`; sources are input planes
/// (`ins`) or outputs written before.
fn fill(ops: &[Resolved], ins: &[f32], outs: &mut [f32], plane: usize, width: usize) {
    let n_in = ins.len() / plane.max(1);
    for (j, op) in ops.iter().enumerate() {
        let (done, rest) = outs.split_at_mut(j * plane);
        let done: &[f32] = done;
        let src: Vec<&[f32]> = op
            .sources
            .iter()
            .map(|&s| {
                if s < n_in {
                    &ins[s * plane..(s + 1) * plane]
                } else {
                    &done[(s - n_in) * plane..(s - n_in + 1) * plane]
                }
            })
            .collect();
        let dst = &mut rest[..plane];
        if let CombineKind::Thin { low, high } = op.kind {
            // Needs neighbours, and hysteresis the whole plane: not by chunks.
            let edges = thin_edges(
                src[0],
                src[1],
                width,
                plane / width.max(1),
                low as f32,
                high as f32,
            );
            dst.par_iter_mut()
                .zip(&edges)
                .for_each(|(d, e)| *d = f32::from(u8::from(*e)));
            continue;
        }
        dst.par_chunks_mut(CHUNK).enumerate().for_each(|(ci, d)| {
            let at = ci * CHUNK;
            let s: Vec<&[f32]> = src.iter().map(|p| &p[at..at + d.len()]).collect();
            one_chunk(op, &s, d);
        });
    }
}

/// One output over one chunk, with AVX2 where the CPU has it (the same code
/// compiled for wider registers; the release build targets every x86-64).
fn chunk_of(op: &Resolved, src: &[&[f32]], d: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        unsafe { chunk_avx2(op, src, d) };
        return;
    }
    one_chunk(op, src, d);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn chunk_avx2(op: &Resolved, src: &[&[f32]], d: &mut [f32]) {
    one_chunk(op, src, d);
}

/// One output over one chunk.
#[inline(always)]
fn one_chunk(op: &Resolved, src: &[&[f32]], d: &mut [f32]) {
    match &op.kind {
        CombineKind::Magnitude | CombineKind::Energy => {
            let root = op.kind == CombineKind::Magnitude;
            if let ([a, b], true) = (src, root) {
                // The common case, a derivative pair: in f32, which vectorises
                // (error within 2 ulp), redone in f64 where x² + y² could
                // overflow or lose bits to underflow.
                for ((o, x), y) in d.iter_mut().zip(*a).zip(*b) {
                    *o = (x * x + y * y).sqrt();
                }
                for ((o, x), y) in d.iter_mut().zip(*a).zip(*b) {
                    let s = *o;
                    if !(s > 1e-15 && s < 1e18) {
                        *o = (*x as f64).hypot(*y as f64) as f32;
                    }
                }
            } else if let [a, b] = src {
                for ((o, x), y) in d.iter_mut().zip(*a).zip(*b) {
                    *o = ((*x as f64) * (*x as f64) + (*y as f64) * (*y as f64)) as f32;
                }
            } else {
                let acc = weighted_sum(src, None, true);
                for (o, e) in d.iter_mut().zip(acc) {
                    *o = if root { e.sqrt() } else { e } as f32;
                }
            }
        }
        CombineKind::Orientation => {
            let (x, y) = (src[0], src[1]);
            for ((o, x), y) in d.iter_mut().zip(x).zip(y) {
                *o = orientation(*x, *y);
            }
        }
        CombineKind::Max => {
            d.copy_from_slice(src[0]);
            for s in &src[1..] {
                for (o, v) in d.iter_mut().zip(*s) {
                    if *v > *o {
                        *o = *v;
                    }
                }
            }
        }
        CombineKind::Argmax(gives) => {
            let mut best: Vec<f32> = src[0].to_vec();
            let value = |i: usize| match gives {
                Gives::Index => i as f32,
                Gives::Angle => op.angles[i],
            };
            d.fill(value(0));
            for (i, s) in src.iter().enumerate().skip(1) {
                let v_i = value(i);
                for ((o, b), v) in d.iter_mut().zip(&mut best).zip(*s) {
                    if *v > *b {
                        *b = *v;
                        *o = v_i;
                    }
                }
            }
        }
        CombineKind::Sum | CombineKind::Mean => {
            let n = if op.kind == CombineKind::Mean {
                src.len() as f64
            } else {
                1.0
            };
            for (o, e) in d.iter_mut().zip(weighted_sum(src, None, false)) {
                *o = (e / n) as f32;
            }
        }
        CombineKind::Weighted(w) => {
            for (o, e) in d.iter_mut().zip(weighted_sum(src, Some(w), false)) {
                *o = e as f32;
            }
        }
        CombineKind::Thin { .. } => unreachable!("thin runs over whole planes"),
    }
}

/// Σ wᵢ·xᵢ (or Σ xᵢ² with `square`) in f64, per sample of the chunk.
fn weighted_sum(src: &[&[f32]], w: Option<&[f64]>, square: bool) -> Vec<f64> {
    let mut acc = vec![0f64; src[0].len()];
    for (i, s) in src.iter().enumerate() {
        let wi = w.map_or(1.0, |w| w[i]);
        for (a, v) in acc.iter_mut().zip(*s) {
            let v = *v as f64;
            *a += if square { v * v } else { wi * v };
        }
    }
    acc
}

/// atan2(y, x) in degrees, in (−180, 180] (−180 is written 180, −0 as 0).
///
/// Written out rather than calling the C library's atanf, which took a sixth
/// of a whole 4096² gradient run (perf, cpu-clock) and does not vectorise:
/// a = min(|x|, |y|)/max(|x|, |y|) in [0, 1], atan a = a·P(a²) with P of
/// degree 8 (least squares on Chebyshev nodes, fitted for this project with
/// NumPy; relative error below 1.3e-7 on [0, 1] evaluated in f32), then the
/// octant is unfolded. Tested against f64 atan2 below (within 4e-7 relative).
#[inline(always)]
pub fn orientation(x: f32, y: f32) -> f32 {
    const P: [f32; 9] = [
        1.0,
        -3.333_313_8e-1,
        1.999_369_4e-1,
        -1.421_110_6e-1,
        1.066_748_7e-1,
        -7.556_900_4e-2,
        4.327_824_3e-2,
        -1.641_319e-2,
        2.932_762e-3,
    ];
    let (ax, ay) = (x.abs(), y.abs());
    let (lo, hi) = (ax.min(ay), ax.max(ay));
    let a = if hi > 0.0 { lo / hi } else { 0.0 };
    let t = a * a;
    let mut p = P[8];
    for c in P[..8].iter().rev() {
        p = p * t + c;
    }
    let mut r = a * p;
    if ay > ax {
        r = std::f32::consts::FRAC_PI_2 - r;
    }
    if x < 0.0 {
        r = std::f32::consts::PI - r;
    }
    // y = −0 counts as above the axis, so the half-turn is +180.
    if y < 0.0 {
        r = -r;
    }
    let d = r * (180.0 / std::f32::consts::PI) + 0.0;
    // A y just below the axis on the left rounds π − r to π: also +180.
    if d <= -180.0 {
        180.0
    } else {
        d
    }
}

/// Canny's non-maximum suppression and hysteresis over a gradient pair:
/// `true` on edge pixels.
///
/// Written here because imageproc's `edges::canny` takes an 8-bit image and
/// does its own fixed smoothing (σ = 1.4) and Sobel gradients, while this
/// stage works on whatever float pair the recipe's conv stages made, and
/// imageproc keeps its suppression and hysteresis steps private. The
/// hysteresis's connected groups come from [`crate::regions::label`].
pub fn thin_edges(gx: &[f32], gy: &[f32], w: usize, h: usize, low: f32, high: f32) -> Vec<bool> {
    let mag: Vec<f32> = gx
        .par_iter()
        .zip(gy)
        .map(|(x, y)| ((*x as f64).hypot(*y as f64)) as f32)
        .collect();
    // 0: not a candidate, 1: a local maximum ≥ low, 2: one ≥ high.
    let mut class = vec![0u8; w * h];
    if w >= 3 && h >= 3 {
        class
            .par_chunks_mut(w)
            .enumerate()
            .skip(1)
            .take(h - 2)
            .for_each(|(r, row)| {
                for (col, cl) in row.iter_mut().enumerate().take(w - 1).skip(1) {
                    let i = r * w + col;
                    let m = mag[i];
                    if m < low || m == 0.0 {
                        continue;
                    }
                    let (dx, dy) = (gx[i], gy[i]);
                    let at = |rr: usize, cc: usize| mag[rr * w + cc];
                    // One step along (dx, dy)/max(|dx|, |dy|): a whole step on the
                    // larger axis, a fraction t on the other, interpolated between
                    // the two neighbours it falls between.
                    let (sr, sc) = (dy.signum() as isize, dx.signum() as isize);
                    let (forward, backward) = if dy.abs() >= dx.abs() {
                        let t = dx.abs() / dy.abs();
                        let f = |s: isize| {
                            let rr = (r as isize + s * sr) as usize;
                            let straight = at(rr, col);
                            let diag = at(rr, (col as isize + s * sc) as usize);
                            straight * (1.0 - t) + diag * t
                        };
                        (f(1), f(-1))
                    } else {
                        let t = dy.abs() / dx.abs();
                        let f = |s: isize| {
                            let cc = (col as isize + s * sc) as usize;
                            let straight = at(r, cc);
                            let diag = at((r as isize + s * sr) as usize, cc);
                            straight * (1.0 - t) + diag * t
                        };
                        (f(1), f(-1))
                    };
                    if m >= forward && m >= backward {
                        *cl = if m >= high { 2 } else { 1 };
                    }
                }
            });
    }
    // Hysteresis: the 8-connected groups of candidates that hold a strong one.
    let labels = label(&class, w, h, Connectivity::Eight);
    let mut strong = vec![false; labels.count + 1];
    for (l, c) in labels.labels.iter().zip(&class) {
        if *c == 2 {
            strong[*l as usize] = true;
        }
    }
    labels
        .labels
        .par_iter()
        .map(|&l| l != 0 && strong[l as usize])
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn orientation_agrees_with_f64_atan2() {
        let mut worst = 0f64;
        let mut s = 0x9e37_79b9_7f4a_7c15u64;
        for i in 0..400_000 {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            let (a, b) = (
                (s >> 40) as f32 / 8.0e6 - 1.0,
                ((s >> 16) & 0xff_ffff) as f32 / 8.0e6 - 1.0,
            );
            // Also tiny and huge magnitudes, and one axis near zero.
            let k = [1.0f32, 1e-30, 1e30, 3.0][i % 4];
            let (x, y) = if i % 7 == 0 {
                (a * k, b * 1e-6 * k)
            } else {
                (a * k, b * k)
            };
            let want = (y as f64).atan2(x as f64).to_degrees();
            let want = if want <= -180.0 { 180.0 } else { want };
            let got = orientation(x, y) as f64;
            let mut d = (got - want).rem_euclid(360.0);
            d = d.min(360.0 - d);
            worst = worst.max(d / want.abs().max(1e-30));
        }
        assert!(worst < 4e-7, "worst relative error {worst}");
    }

    #[test]
    fn orientation_range_and_directions() {
        assert_eq!(orientation(1.0, 0.0), 0.0);
        assert_eq!(orientation(0.0, 1.0), 90.0);
        assert_eq!(orientation(-1.0, 0.0), 180.0);
        assert_eq!(orientation(-1.0, -0.0), 180.0);
        assert_eq!(orientation(0.0, -1.0), -90.0);
        // π − r rounds to π in f32: still +180 (found on a real capture).
        assert_eq!(orientation(-0.1607, -1.86e-9), 180.0);
        assert_eq!(orientation(0.0, 0.0).to_bits(), 0.0f32.to_bits());
        assert_eq!(orientation(1.0, -0.0).to_bits(), 0.0f32.to_bits());
    }

    #[test]
    fn a_ramp_edge_thins_to_one_column() {
        // A vertical step smoothed over a few columns: the gradient peaks in
        // one column, which alone survives.
        let (w, h) = (9, 7);
        let profile = [0.0f32, 0.0, 1.0, 3.0, 4.0, 3.0, 1.0, 0.0, 0.0];
        let gx: Vec<f32> = (0..h).flat_map(|_| profile).collect();
        let gy = vec![0.0; w * h];
        let e = thin_edges(&gx, &gy, w, h, 0.5, 2.0);
        for r in 0..h {
            let row: Vec<bool> = e[r * w..(r + 1) * w].to_vec();
            let want = (1..h - 1).contains(&r);
            assert_eq!(
                row.iter().filter(|v| **v).count(),
                usize::from(want),
                "row {r}"
            );
            assert_eq!(row[4], want);
        }
    }
}
