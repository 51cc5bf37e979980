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
//! numpy.percentile's default). Sums are accumulated in f64.

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

/// Computes the statistics of `values`; `scratch` is reused for the percentile
/// selection so no allocation happens per map once it has grown.
pub fn map_stats(values: &[f32], threshold: Option<f32>, scratch: &mut Vec<f32>) -> MapStats {
    scratch.clear();
    scratch.extend(values.iter().copied().filter(|v| v.is_finite()));
    let n = scratch.len();
    let total = values.len().max(1) as f64;
    let zeros = values.iter().filter(|v| **v == 0.0).count();
    let above = threshold.map(|t| values.iter().filter(|v| **v > t).count() as f64 / total);
    if n == 0 {
        return MapStats {
            count: 0,
            non_finite: values.len(),
            min: None,
            max: None,
            mean: None,
            std: None,
            p1: None,
            p50: None,
            p99: None,
            zero_fraction: zeros as f64 / total,
            above_fraction: above,
        };
    }
    let (mut min, mut max, mut sum) = (f64::INFINITY, f64::NEG_INFINITY, 0.0f64);
    for &v in scratch.iter() {
        let v = v as f64;
        min = min.min(v);
        max = max.max(v);
        sum += v;
    }
    let mean = sum / n as f64;
    let var = scratch
        .iter()
        .map(|&v| (v as f64 - mean).powi(2))
        .sum::<f64>()
        / n as f64;
    let p1 = percentile(scratch, 1.0);
    let p50 = percentile(scratch, 50.0);
    let p99 = percentile(scratch, 99.0);
    MapStats {
        count: n,
        non_finite: values.len() - n,
        min: Some(min),
        max: Some(max),
        mean: Some(mean),
        std: Some(var.sqrt()),
        p1: Some(p1),
        p50: Some(p50),
        p99: Some(p99),
        zero_fraction: zeros as f64 / total,
        above_fraction: above,
    }
}

/// Percentile `p` (0–100, clamped) of finite values by linear interpolation
/// (module header); reorders `v` in place (selection, not a full sort). `NaN`
/// for no values.
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
