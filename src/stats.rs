//! Per-map statistics, one row per image and channel in `stats.csv`.
//!
//! Over the finite samples of a map: minimum, maximum, mean, population standard
//! deviation (divisor n), the 1st, 50th and 99th percentiles, the fraction of
//! samples exactly 0, and the fraction above a threshold (strictly greater).
//! Non-finite samples are counted, not included.
//!
//! Percentiles use linear interpolation between order statistics: for sorted
//! x₀ … x₍ₙ₋₁₎ and p in [0, 100], h = (n − 1)·p/100 and
//! Q = x⌊h⌋ + (h − ⌊h⌋)·(x⌊h⌋₊₁ − x⌊h⌋) (Hyndman & Fan, "Sample quantiles in
//! statistical packages", The American Statistician 50(4), 1996, definition 7;
//! numpy.percentile's default).
//!
//! **How, in O(n) with no sort and no copy of the map.** A float's bits, with the
//! sign bit flipped for positives and all bits flipped for negatives, order
//! exactly as the floats do (an order-preserving key). Pass one counts the keys'
//! top 16 bits in a histogram, beside min, max, sums, zeros and the threshold
//! count; the histogram names the bucket that holds each wanted order statistic
//! and its rank inside. Pass two, beside the squared deviations, counts the low
//! 16 bits of the keys in those few buckets; the full key, so the exact value,
//! follows. Both passes run in parallel over fixed chunks of the map, and sums
//! are added chunk by chunk in order, so the result does not depend on the
//! number of threads. Sums are accumulated in f64; the variance comes from
//! each chunk's squared deviations from its own mean, combined in chunk order
//! (Chan, Golub & LeVeque 1983), so one pass over the map gives it.

use rayon::prelude::*;

/// Statistics of one map. The figures over finite samples are `None` for a
/// map that has none.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct MapStats {
    /// Finite samples.
    pub count: usize,
    /// NaN or infinite samples.
    pub non_finite: usize,
    /// Smallest finite sample.
    pub min: Option<f64>,
    /// Largest finite sample.
    pub max: Option<f64>,
    /// Mean.
    pub mean: Option<f64>,
    /// Population standard deviation.
    pub std: Option<f64>,
    /// 1st percentile.
    pub p1: Option<f64>,
    /// Median.
    pub p50: Option<f64>,
    /// 99th percentile.
    pub p99: Option<f64>,
    /// Fraction of all samples that are exactly 0.
    pub zero_fraction: f64,
    /// Fraction of all samples above the threshold, if one was given.
    pub above_fraction: Option<f64>,
}

/// Samples per chunk: the unit of parallel work and of the f64 partial sums.
const CHUNK: usize = 1 << 15;
/// Buckets of each histogram (16 bits of the key).
const BUCKETS: usize = 1 << 16;

/// The order-preserving key of a finite float (see the module header).
#[inline(always)]
fn key(v: f32) -> u32 {
    let b = v.to_bits();
    if b & 0x8000_0000 != 0 {
        !b
    } else {
        b | 0x8000_0000
    }
}

/// The float of a key.
fn unkey(k: u32) -> f32 {
    f32::from_bits(if k & 0x8000_0000 != 0 {
        k & 0x7FFF_FFFF
    } else {
        !k
    })
}

/// What pass one finds in a chunk.
struct First {
    count: usize,
    zeros: usize,
    above: usize,
    min: f32,
    max: f32,
    sum: f64,
}

/// The reductions of pass one over a chunk, written as four independent lanes
/// (non-finite samples selected out, not branched over) so they run as
/// vectors; the lanes are added in a fixed order at the end.
#[inline(always)]
fn reduce_body(chunk: &[f32], t: f32) -> First {
    let (mut count, mut zeros, mut above) = ([0u32; 4], [0u32; 4], [0u32; 4]);
    let (mut lo, mut hi) = ([f32::INFINITY; 4], [f32::NEG_INFINITY; 4]);
    let mut sum = [0.0f64; 4];
    let mut quads = chunk.chunks_exact(4);
    for q in &mut quads {
        for i in 0..4 {
            let v = q[i];
            let finite = v.is_finite();
            count[i] += u32::from(finite);
            zeros[i] += u32::from(v == 0.0);
            above[i] += u32::from(v > t);
            // Compare-and-select (not f32::min, whose NaN rule keeps the
            // loop scalar); non-finite samples are selected out first.
            let low = if finite { v } else { f32::INFINITY };
            let high = if finite { v } else { f32::NEG_INFINITY };
            lo[i] = if low < lo[i] { low } else { lo[i] };
            hi[i] = if high > hi[i] { high } else { hi[i] };
            sum[i] += if finite { v as f64 } else { 0.0 };
        }
    }
    for &v in quads.remainder() {
        let finite = v.is_finite();
        count[0] += u32::from(finite);
        zeros[0] += u32::from(v == 0.0);
        above[0] += u32::from(v > t);
        if finite {
            lo[0] = lo[0].min(v);
            hi[0] = hi[0].max(v);
            sum[0] += v as f64;
        }
    }
    First {
        count: count.iter().map(|&c| c as usize).sum(),
        zeros: zeros.iter().map(|&c| c as usize).sum(),
        above: above.iter().map(|&c| c as usize).sum(),
        min: lo.iter().copied().fold(f32::INFINITY, f32::min),
        max: hi.iter().copied().fold(f32::NEG_INFINITY, f32::max),
        sum: (sum[0] + sum[1]) + (sum[2] + sum[3]),
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn reduce_avx2(chunk: &[f32], t: f32) -> First {
    reduce_body(chunk, t)
}

/// Squared deviations from `mean` of a chunk's finite samples, in four lanes.
#[inline(always)]
fn deviations_body(chunk: &[f32], mean: f64) -> f64 {
    let mut d = [0.0f64; 4];
    let mut quads = chunk.chunks_exact(4);
    for q in &mut quads {
        for i in 0..4 {
            let x = q[i] as f64 - mean;
            d[i] += if q[i].is_finite() { x * x } else { 0.0 };
        }
    }
    for &v in quads.remainder() {
        if v.is_finite() {
            d[0] += (v as f64 - mean) * (v as f64 - mean);
        }
    }
    (d[0] + d[1]) + (d[2] + d[3])
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn deviations_avx2(chunk: &[f32], mean: f64) -> f64 {
    deviations_body(chunk, mean)
}

fn first_pass(chunk: &[f32], threshold: Option<f32>, hist: &mut [u32]) -> First {
    let t = threshold.unwrap_or(f32::NAN);
    #[cfg(target_arch = "x86_64")]
    let f = if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        unsafe { reduce_avx2(chunk, t) }
    } else {
        reduce_body(chunk, t)
    };
    #[cfg(not(target_arch = "x86_64"))]
    let f = reduce_body(chunk, t);
    // Two tables taken in turn, so runs of equal buckets (smooth maps) do not
    // wait on one counter; they are added when merged.
    let (a, b) = hist.split_at_mut(BUCKETS);
    let mut pairs = chunk.chunks_exact(2);
    for p in &mut pairs {
        if p[0].is_finite() {
            a[(key(p[0]) >> 16) as usize] += 1;
        }
        if p[1].is_finite() {
            b[(key(p[1]) >> 16) as usize] += 1;
        }
    }
    for &v in pairs.remainder() {
        if v.is_finite() {
            a[(key(v) >> 16) as usize] += 1;
        }
    }
    f
}

fn deviations(chunk: &[f32], mean: f64) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        return unsafe { deviations_avx2(chunk, mean) };
    }
    deviations_body(chunk, mean)
}

/// Maps of at most this many samples take the plain path: the histograms'
/// fixed cost (a few 65,536-entry tables) would outweigh the counting.
const SMALL: usize = 1 << 16;

/// Computes the statistics of `values` (see the module header), in parallel
/// on the current rayon pool. Both paths give the exact order statistics.
pub fn map_stats(values: &[f32], threshold: Option<f32>) -> MapStats {
    if takes_histograms(values.len()) {
        histogram_stats(values, threshold)
    } else {
        small_stats(values, threshold)
    }
}

/// The plain path for small maps: the same reductions, then selection on a
/// copy of the finite samples.
fn small_stats(values: &[f32], threshold: Option<f32>) -> MapStats {
    let total = values.len().max(1) as f64;
    let f = reduce_body(values, threshold.unwrap_or(f32::NAN));
    let mut finite: Vec<f32> = values.iter().copied().filter(|v| v.is_finite()).collect();
    let n = finite.len();
    let (mean, std) = if n > 0 {
        let mean = f.sum / n as f64;
        (
            Some(mean),
            Some((deviations_body(values, mean) / n as f64).sqrt()),
        )
    } else {
        (None, None)
    };
    let mut pct = |p: f64| (n > 0).then(|| percentile(&mut finite, p));
    MapStats {
        count: n,
        non_finite: values.len() - n,
        min: (n > 0).then_some(f.min as f64),
        max: (n > 0).then_some(f.max as f64),
        mean,
        std,
        p1: pct(1.0),
        p50: pct(50.0),
        p99: pct(99.0),
        zero_fraction: f.zeros as f64 / total,
        above_fraction: threshold.map(|_| f.above as f64 / total),
    }
}

/// The histogram path (see the module header).
fn histogram_stats(values: &[f32], threshold: Option<f32>) -> MapStats {
    FirstPass::of(values, threshold).finish_with(values, &mut [] as &mut [u8], |_, _| {})
}

/// What pass one of the histogram path found over a whole map: everything but
/// the order statistics, and where those lie. Pass two ([`FirstPass::finish_with`])
/// reads the map once more, and can do a caller's own per-sample work on each
/// chunk while it is in cache (a view's levels need the extremes pass one found).
pub struct FirstPass {
    threshold: bool,
    total: usize,
    n: usize,
    zeros: usize,
    above: usize,
    min: f32,
    max: f32,
    mean: f64,
    m2: f64,
    /// The order statistics each percentile needs: (p, ⌊h⌋, h − ⌊h⌋).
    wanted: Vec<(f64, usize, f64)>,
    /// (rank, top bucket, rank inside the bucket).
    located: Vec<(usize, usize, usize)>,
    /// The top buckets pass two counts the low bits of.
    buckets: Vec<usize>,
    /// Per top bucket, its table in pass two, or `u8::MAX`.
    slot: Vec<u8>,
}

/// Count, sum and squared deviations from its own mean of a chunk's finite
/// samples (the chunk is in cache: the second look is cheap), combined across
/// chunks in chunk order by Chan, Golub and LeVeque's update (The American
/// Statistician 37(3), 1983): δ = mean_b − mean_a, M2 = M2_a + M2_b + δ²·n_a·n_b/n.
fn combine(
    (na, ma, m2a): (usize, f64, f64),
    (nb, mb, m2b): (usize, f64, f64),
) -> (usize, f64, f64) {
    if na == 0 {
        return (nb, mb, m2b);
    }
    if nb == 0 {
        return (na, ma, m2a);
    }
    let n = na + nb;
    let d = mb - ma;
    (
        n,
        ma + d * nb as f64 / n as f64,
        m2a + m2b + d * d * (na as f64) * (nb as f64) / n as f64,
    )
}

impl FirstPass {
    /// Pass one over `values`, in parallel.
    pub fn of(values: &[f32], threshold: Option<f32>) -> FirstPass {
        // Few enough tasks that their histograms cost little next to the counting.
        let min_len = (values.len() / CHUNK / (4 * rayon::current_num_threads())).max(1);
        let (firsts, hist) = values
            .par_chunks(CHUNK)
            .enumerate()
            .with_min_len(min_len)
            .fold(
                || (Vec::new(), vec![0u32; 2 * BUCKETS]),
                |(mut firsts, mut hist), (i, chunk)| {
                    let f = first_pass(chunk, threshold, &mut hist);
                    let m = if f.count > 0 {
                        f.sum / f.count as f64
                    } else {
                        0.0
                    };
                    let m2 = deviations(chunk, m);
                    firsts.push((i, f, m2));
                    (firsts, hist)
                },
            )
            .reduce(
                || (Vec::new(), vec![0u32; 2 * BUCKETS]),
                |(mut fa, mut ha), (fb, hb)| {
                    fa.extend(fb);
                    ha.iter_mut().zip(&hb).for_each(|(a, b)| *a += b);
                    (fa, ha)
                },
            );
        let hist: Vec<u32> = hist[..BUCKETS]
            .iter()
            .zip(&hist[BUCKETS..])
            .map(|(a, b)| a + b)
            .collect();
        let mut firsts = firsts;
        // Chunk order fixes the order sums and deviations are combined in.
        firsts.sort_by_key(|(i, _, _)| *i);
        let n: usize = firsts.iter().map(|(_, f, _)| f.count).sum();
        let sum: f64 = firsts.iter().map(|(_, f, _)| f.sum).sum();
        let (_, _, m2) = firsts
            .iter()
            .fold((0usize, 0.0f64, 0.0f64), |acc, (_, f, m2)| {
                let m = if f.count > 0 {
                    f.sum / f.count as f64
                } else {
                    0.0
                };
                combine(acc, (f.count, m, *m2))
            });
        let wanted: Vec<(f64, usize, f64)> = if n == 0 {
            Vec::new()
        } else {
            [1.0, 50.0, 99.0]
                .iter()
                .map(|&p| {
                    let h = (n - 1) as f64 * p / 100.0;
                    (p, h.floor() as usize, h - h.floor())
                })
                .collect()
        };
        let mut ranks: Vec<usize> = wanted
            .iter()
            .flat_map(|&(_, lo, frac)| {
                let hi = if frac > 0.0 && lo + 1 < n { lo + 1 } else { lo };
                [lo, hi]
            })
            .collect();
        ranks.sort_unstable();
        ranks.dedup();
        let mut cumulative = Vec::with_capacity(BUCKETS + 1);
        cumulative.push(0usize);
        for c in &hist {
            cumulative.push(cumulative.last().expect("seeded") + *c as usize);
        }
        let located: Vec<(usize, usize, usize)> = ranks
            .iter()
            .map(|&r| {
                let b = cumulative.partition_point(|&c| c <= r) - 1;
                (r, b, r - cumulative[b])
            })
            .collect();
        let mut buckets: Vec<usize> = located.iter().map(|l| l.1).collect();
        buckets.dedup();
        let mut slot = vec![u8::MAX; BUCKETS];
        for (i, &b) in buckets.iter().enumerate() {
            slot[b] = i as u8;
        }
        FirstPass {
            threshold: threshold.is_some(),
            total: values.len(),
            n,
            zeros: firsts.iter().map(|(_, f, _)| f.zeros).sum(),
            above: firsts.iter().map(|(_, f, _)| f.above).sum(),
            min: firsts
                .iter()
                .map(|(_, f, _)| f.min)
                .fold(f32::INFINITY, f32::min),
            max: firsts
                .iter()
                .map(|(_, f, _)| f.max)
                .fold(f32::NEG_INFINITY, f32::max),
            mean: if n > 0 { sum / n as f64 } else { 0.0 },
            m2,
            wanted,
            located,
            buckets,
            slot,
        }
    }

    /// The smallest and largest finite samples (`None` when there are none).
    pub fn extremes(&self) -> (Option<f64>, Option<f64>) {
        let any = self.n > 0;
        (
            any.then_some(self.min as f64),
            any.then_some(self.max as f64),
        )
    }

    /// Pass two over the same `values`, in parallel chunks, calling `f` on each
    /// chunk and its piece of `out` (chunks of the same length; `out` empty
    /// for none) while the chunk is in cache; then the statistics.
    pub fn finish_with<T: Send>(
        self,
        values: &[f32],
        out: &mut [T],
        f: impl Fn(&[f32], &mut [T]) + Sync,
    ) -> MapStats {
        let total = self.total.max(1) as f64;
        let nb = self.buckets.len();
        let slot = &self.slot;
        let count_low = |low: &mut Vec<u32>, chunk: &[f32]| {
            if nb == 0 {
                return;
            }
            for &v in chunk {
                if v.is_finite() {
                    let k = key(v);
                    let s = slot[(k >> 16) as usize];
                    if s != u8::MAX {
                        low[s as usize * BUCKETS + (k & 0xFFFF) as usize] += 1;
                    }
                }
            }
        };
        let min_len = (values.len() / CHUNK / (4 * rayon::current_num_threads())).max(1);
        let init = || vec![0u32; BUCKETS * nb];
        let merge = |mut a: Vec<u32>, b: Vec<u32>| {
            a.iter_mut().zip(&b).for_each(|(x, y)| *x += y);
            a
        };
        let low = if out.is_empty() {
            values
                .par_chunks(CHUNK)
                .with_min_len(min_len)
                .fold(init, |mut low, chunk| {
                    count_low(&mut low, chunk);
                    low
                })
                .reduce(init, merge)
        } else {
            values
                .par_chunks(CHUNK)
                .zip(out.par_chunks_mut(CHUNK))
                .with_min_len(min_len)
                .fold(init, |mut low, (chunk, o)| {
                    count_low(&mut low, chunk);
                    f(chunk, o);
                    low
                })
                .reduce(init, merge)
        };
        let n = self.n;
        let above = self.threshold.then(|| self.above as f64 / total);
        if n == 0 {
            return MapStats {
                count: 0,
                non_finite: self.total,
                min: None,
                max: None,
                mean: None,
                std: None,
                p1: None,
                p50: None,
                p99: None,
                zero_fraction: self.zeros as f64 / total,
                above_fraction: above,
            };
        }
        let value_at = |r: usize| -> f64 {
            let &(_, b, inside) = self.located.iter().find(|l| l.0 == r).expect("located");
            let i = self
                .buckets
                .iter()
                .position(|&x| x == b)
                .expect("a wanted bucket");
            let mut seen = 0usize;
            for (lowbits, &c) in low[i * BUCKETS..(i + 1) * BUCKETS].iter().enumerate() {
                seen += c as usize;
                if seen > inside {
                    return unkey(((b as u32) << 16) | lowbits as u32) as f64;
                }
            }
            unreachable!("the bucket holds the rank")
        };
        let pct = |(_, lo, frac): (f64, usize, f64)| {
            let x_lo = value_at(lo);
            if frac == 0.0 || lo + 1 >= n {
                x_lo
            } else {
                x_lo + frac * (value_at(lo + 1) - x_lo)
            }
        };
        MapStats {
            count: n,
            non_finite: self.total - n,
            min: Some(self.min as f64),
            max: Some(self.max as f64),
            mean: Some(self.mean),
            std: Some((self.m2 / n as f64).sqrt()),
            p1: Some(pct(self.wanted[0])),
            p50: Some(pct(self.wanted[1])),
            p99: Some(pct(self.wanted[2])),
            zero_fraction: self.zeros as f64 / total,
            above_fraction: above,
        }
    }
}

/// Whether a map takes the histogram path (and so [`FirstPass`]).
pub fn takes_histograms(len: usize) -> bool {
    len > SMALL
}

/// Percentile `p` (0–100, clamped) of finite values by linear interpolation
/// (module header); reorders `v` in place (selection, not a full sort). `NaN`
/// for no values. A slow, plain companion of [`map_stats`], for checks.
pub fn percentile(v: &mut [f32], p: f64) -> f64 {
    let n = v.len();
    if n == 0 {
        return f64::NAN;
    }
    let p = p.clamp(0.0, 100.0);
    let h = (n - 1) as f64 * p / 100.0;
    let lo = h.floor() as usize;
    let (_, x_lo, rest) = v.select_nth_unstable_by(lo, f32::total_cmp);
    let x_lo = *x_lo as f64;
    let frac = h - lo as f64;
    if frac == 0.0 || rest.is_empty() {
        return x_lo;
    }
    let x_hi = rest.iter().copied().fold(f32::INFINITY, f32::min) as f64;
    x_lo + frac * (x_hi - x_lo)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_order_as_the_floats_do() {
        let v = [
            f32::NEG_INFINITY,
            -3.5,
            -1e-30,
            -0.0,
            0.0,
            1e-40,
            2.0,
            f32::MAX,
        ];
        for w in v.windows(2) {
            assert!(key(w[0]) < key(w[1]), "{} {}", w[0], w[1]);
        }
        for x in v {
            assert_eq!(unkey(key(x)).to_bits(), x.to_bits());
        }
    }

    #[test]
    fn histogram_percentiles_equal_selection_on_awkward_maps() {
        let mut seed = 5u64;
        let mut next = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (seed >> 33) as u32
        };
        let maps: Vec<Vec<f32>> = vec![
            vec![1.0],
            vec![2.0, -1.0],
            vec![0.0; 1000],
            (0..100_003).map(|_| (next() % 7) as f32 - 3.0).collect(),
            (0..70_001).map(|_| f32::from_bits(next())).collect(),
            (0..50_000)
                .map(|i| {
                    if i % 3 == 0 {
                        f32::NAN
                    } else {
                        (next() as f32) * 1e-9 - 2.0
                    }
                })
                .collect(),
        ];
        for m in &maps {
            let s = histogram_stats(m, Some(0.5));
            let plain = small_stats(m, Some(0.5));
            assert_eq!(
                (
                    s.count,
                    s.non_finite,
                    s.min,
                    s.max,
                    s.zero_fraction,
                    s.above_fraction
                ),
                (
                    plain.count,
                    plain.non_finite,
                    plain.min,
                    plain.max,
                    plain.zero_fraction,
                    plain.above_fraction
                )
            );
            assert_eq!((s.p1, s.p50, s.p99), (plain.p1, plain.p50, plain.p99));
            let mut finite: Vec<f32> = m.iter().copied().filter(|v| v.is_finite()).collect();
            if finite.is_empty() {
                assert_eq!(s.count, 0);
                continue;
            }
            for (p, got) in [(1.0, s.p1), (50.0, s.p50), (99.0, s.p99)] {
                let want = percentile(&mut finite, p);
                assert_eq!(
                    got.unwrap().to_bits(),
                    want.to_bits(),
                    "p{p} of {} values",
                    m.len()
                );
            }
            assert_eq!(s.count + s.non_finite, m.len());
        }
    }
}
