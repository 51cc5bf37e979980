//! Otsu's threshold (Otsu, IEEE SMC 9(1), 1979) of a float map.

use rayon::prelude::*;

/// Otsu's threshold of `values`, whose finite samples lie in `[lo, hi]`: a
/// histogram of 256 equal bins over [lo, hi], the split that maximises the
/// between-class variance w₀w₁(μ₀ − μ₁)², and the centre of the last bin of
/// the lower class, so that `value > threshold` is the upper class. This is
/// scikit-image's `threshold_otsu(image, nbins=256)` (documentation of
/// skimage.filters.threshold_otsu, 0.26; checked in tools/check_combine.py).
/// A map of one value gives that value.
///
/// Written here because imageproc's `otsu_level` takes 8-bit images only, and
/// accumulates level × count in `u32`, which overflows for images of more
/// than 2³²/255 ≈ 16.8 million pixels at high levels.
pub fn otsu(values: &[f32], lo: f64, hi: f64) -> f64 {
    let bins = OtsuBins::new(lo, hi);
    values.par_chunks(1 << 16).for_each(|c| bins.add(c));
    bins.level()
}

/// Bins of the histogram behind [`otsu`], filled a chunk at a time from any
/// thread (so the statistics' own pass over a map can fill it as it goes).
pub struct OtsuBins {
    lo: f64,
    hi: f64,
    norm: f64,
    eps: f32,
    counts: std::sync::Mutex<[u64; OTSU_BINS]>,
}

const OTSU_BINS: usize = 256;

impl OtsuBins {
    /// Empty bins over [lo, hi], the extremes of the map's finite samples.
    pub fn new(lo: f64, hi: f64) -> OtsuBins {
        let span = if hi > lo { hi - lo } else { 1.0 };
        // numpy.histogram's rule: (v − lo)·bins/(hi − lo), bins half open, the last closed.
        let norm = OTSU_BINS as f64 / span;
        // How far an f32 bin position can stray from the f64 one: rounding of
        // lo and of each sample's offset, relative to the range.
        let eps = (1e-4 + OTSU_BINS as f64 * (lo.abs() + hi.abs()) / span * 2.4e-7) as f32;
        OtsuBins {
            lo,
            hi,
            norm,
            eps,
            counts: std::sync::Mutex::new([0; OTSU_BINS]),
        }
    }

    /// Counts the finite samples of `c` (with AVX2 where the CPU has it).
    pub fn add(&self, c: &[f32]) {
        #[cfg(target_arch = "x86_64")]
        if crate::engine::simd::avx2() {
            // SAFETY: the CPU has AVX2 (checked at run time just above).
            unsafe { self.add_avx2(c) };
            return;
        }
        self.add_body(c);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn add_avx2(&self, c: &[f32]) {
        self.add_body(c);
    }

    #[inline(always)]
    fn add_body(&self, c: &[f32]) {
        const BINS: usize = OTSU_BINS;
        let (lo, norm, eps) = (self.lo, self.norm, self.eps);
        let exact = |v: f32| {
            if v.is_finite() {
                ((v as f64 - lo) * norm).clamp(0.0, (BINS - 1) as f64) as u16
            } else {
                BINS as u16
            }
        };
        let (lo32, norm32, top) = (lo as f32, norm as f32, (BINS - 1) as f32);
        let mut h = [[0u32; BINS + 1]; 4];
        // A small block at a time, on the stack: a heap buffer per chunk
        // cost more in fresh pages than the arithmetic.
        let mut bins = [0u16; 1024];
        for vs in c.chunks(1024) {
            let bins = &mut bins[..vs.len()];
            if eps < 0.25 {
                for (bs, vs) in bins.chunks_mut(64).zip(vs.chunks(64)) {
                    // The bin, and whether the fraction past its lower edge is
                    // too near 0 or 1 to trust (NaN and ∞ fail too).
                    let mut doubt = false;
                    for (b, v) in bs.iter_mut().zip(vs) {
                        let x = (*v - lo32) * norm32;
                        let k = x.clamp(0.0, top) as u16;
                        let f = x - f32::from(k);
                        doubt |= !(f > eps && f < 1.0 - eps);
                        *b = k;
                    }
                    if doubt {
                        for (b, v) in bs.iter_mut().zip(vs) {
                            *b = exact(*v);
                        }
                    }
                }
            } else {
                for (b, v) in bins.iter_mut().zip(vs) {
                    *b = exact(*v);
                }
            }
            for q in bins.chunks(4) {
                for (k, b) in q.iter().enumerate() {
                    h[k][*b as usize] += 1;
                }
            }
        }
        let mut counts = self.counts.lock().unwrap_or_else(|e| e.into_inner());
        for (i, t) in counts.iter_mut().enumerate() {
            *t += h.iter().map(|h| u64::from(h[i])).sum::<u64>();
        }
    }

    /// The threshold (see [`otsu`]).
    pub fn level(&self) -> f64 {
        const BINS: usize = OTSU_BINS;
        let (lo, hi) = (self.lo, self.hi);
        if hi <= lo || hi.is_nan() || lo.is_nan() {
            return lo;
        }
        let hist = *self.counts.lock().unwrap_or_else(|e| e.into_inner());
        let width = (hi - lo) / BINS as f64;
        let centre = |i: usize| lo + (i as f64 + 0.5) * width;
        let total: f64 = hist.iter().map(|&c| c as f64).sum();
        let total_sum: f64 = hist
            .iter()
            .enumerate()
            .map(|(i, &c)| c as f64 * centre(i))
            .sum();
        let (mut w0, mut s0) = (0.0f64, 0.0f64);
        let (mut best, mut best_var) = (0usize, -1.0f64);
        for (i, &c) in hist.iter().enumerate().take(BINS - 1) {
            w0 += c as f64;
            s0 += c as f64 * centre(i);
            let w1 = total - w0;
            if w0 == 0.0 || w1 == 0.0 {
                continue;
            }
            let (m0, m1) = (s0 / w0, (total_sum - s0) / w1);
            let var = w0 * w1 * (m0 - m1) * (m0 - m1);
            if var > best_var {
                best_var = var;
                best = i;
            }
        }
        centre(best)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn otsu_splits_two_groups() {
        let mut v = vec![0.1f32; 600];
        v.extend(vec![0.9f32; 400]);
        let t = otsu(&v, 0.1, 0.9);
        assert!(t > 0.1 && t < 0.9, "{t}");
        assert_eq!(otsu(&[0.5, 0.5], 0.5, 0.5), 0.5);
    }
}
