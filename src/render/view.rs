//! Views: a feature map as a picture for people, with a recorded mapping so that a
//! pixel can be turned back into a response value.
//!
//! - **Unsigned maps** (every value ≥ 0 by construction: after relu, abs, square,
//!   sigmoid, or from non-negative taps on non-negative input) are grey. Level
//!   L of D levels (255 or 65535) stands for v = lo + L/D·(hi − lo); by default
//!   lo = 0 and hi = the map's maximum.
//! - **Signed maps** use the diverging scale of [`super::colormap`] with zero at
//!   its centre: table index i (0–255) stands for v = (i − 127.5)/127.5 · hi for
//!   i ≥ 127.5 and (i − 127.5)/127.5 · |lo| below; by default hi = −lo = the
//!   map's largest |value|. Signed views are 8-bit at any `--view-depth`,
//!   written as indexed PNG whose palette is the table (one byte a pixel, and
//!   every decoder shows exactly the table's colours).
//!
//! `--view-range LO,HI` fixes lo and hi for every map. Non-finite samples are drawn
//! as level 0 (grey) or the table's centre (signed).

use image::{ImageBuffer, Luma, Rgb};
use serde::{Deserialize, Serialize};

/// Which colour scale a view uses.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Scale {
    /// Grey levels from lo to hi.
    Grey,
    /// The diverging scale, zero at its centre.
    Diverging,
}

/// The value-to-picture mapping of one view, as written to the manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ViewMapping {
    /// Grey or diverging.
    pub scale: Scale,
    /// Value drawn at the low end.
    pub lo: f64,
    /// Value drawn at the high end.
    pub hi: f64,
    /// Levels minus one: 255 or 65535 (grey), 255 (diverging).
    pub levels: u32,
}

/// A rendered view.
pub enum ViewImage {
    /// 8-bit grey.
    Grey8(ImageBuffer<Luma<u8>, Vec<u8>>),
    /// 16-bit grey.
    Grey16(ImageBuffer<Luma<u16>, Vec<u16>>),
    /// Indices into the diverging colour table (written as an indexed PNG whose
    /// palette is the table, so it decodes to exactly the table's colours).
    Indexed(ImageBuffer<Luma<u8>, Vec<u8>>),
}

impl ViewImage {
    /// As 8-bit RGB (for sheets); `table` is the diverging colour table.
    pub fn to_rgb8(&self, table: &[[u8; 3]]) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
        match self {
            ViewImage::Grey8(g) => image::DynamicImage::ImageLuma8(g.clone()).to_rgb8(),
            ViewImage::Grey16(g) => image::DynamicImage::ImageLuma16(g.clone()).to_rgb8(),
            ViewImage::Indexed(i) => ImageBuffer::from_fn(i.width(), i.height(), |x, y| {
                Rgb(table[i.get_pixel(x, y)[0] as usize])
            }),
        }
    }
}

/// Chooses the mapping for a map (its extremes found in parallel).
pub fn mapping(
    values: &[f32],
    signed: bool,
    range: Option<(f32, f32)>,
    depth16: bool,
) -> ViewMapping {
    use rayon::prelude::*;
    let (lo, hi) = values
        .par_chunks(1 << 16)
        .map(|c| {
            c.iter()
                .filter(|v| v.is_finite())
                .fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &v| {
                    (a.min(v), b.max(v))
                })
        })
        .reduce(
            || (f32::INFINITY, f32::NEG_INFINITY),
            |x, y| (x.0.min(y.0), x.1.max(y.1)),
        );
    let finite = lo <= hi;
    mapping_from_extremes(
        finite.then_some(lo as f64),
        finite.then_some(hi as f64),
        signed,
        range,
        depth16,
    )
}

/// The mapping for a map whose finite samples run from `min` to `max` (`None`
/// for a map without finite samples), as [`mapping`] chooses it: grey from 0
/// to the largest value (at least 0), diverging over ± the largest |value|.
pub fn mapping_from_extremes(
    min: Option<f64>,
    max: Option<f64>,
    signed: bool,
    range: Option<(f32, f32)>,
    depth16: bool,
) -> ViewMapping {
    let (lo, hi) = match range {
        Some((lo, hi)) => (lo as f64, hi as f64),
        None if signed => {
            let m = min.unwrap_or(0.0).abs().max(max.unwrap_or(0.0).abs());
            (-m, m)
        }
        None => (0.0, max.unwrap_or(0.0).max(0.0)),
    };
    if signed {
        ViewMapping {
            scale: Scale::Diverging,
            lo,
            hi,
            levels: 255,
        }
    } else {
        ViewMapping {
            scale: Scale::Grey,
            lo,
            hi,
            levels: if depth16 { 65535 } else { 255 },
        }
    }
}

/// `x.round()` for x in [0, 2³¹): half away from zero, as `f64::round`, with
/// an integer conversion instead of the library call `round` is without
/// SSE4.1 (the release build targets every x86-64), so the loops vectorise.
/// The fraction x − ⌊x⌋ is exact in f64 for such x, so the result is too.
#[inline(always)]
fn round_non_negative(x: f64) -> f64 {
    let i = x as i32 as f64;
    i + if x - i >= 0.5 { 1.0 } else { 0.0 }
}

/// Grey levels of `values` (see the module header), written without branches
/// so the loop runs as vectors.
#[inline(always)]
fn grey_body<T: Copy>(values: &[f32], out: &mut [T], lo: f64, span: f64, d: f64, to: fn(f64) -> T) {
    for (o, &v) in out.iter_mut().zip(values) {
        // Rounding and clamping to whole bounds commute, so clamp first.
        let x = ((v as f64 - lo) / span * d).clamp(0.0, d);
        *o = to(round_non_negative(if v.is_finite() { x } else { 0.0 }));
    }
}

/// Diverging table indices of `values` (see the module header), branch-free:
/// the divisor is the positive or the negative end, chosen by the sign.
#[inline(always)]
fn diverging_body(values: &[f32], out: &mut [u8], lo: f64, hi: f64) {
    let (pos_ok, neg_ok, neg) = (hi > 0.0, lo < 0.0, -lo);
    for (o, &v) in out.iter_mut().zip(values) {
        let x = v as f64;
        let up = x >= 0.0;
        // One division: pick the divisor, then divide (the same value as
        // dividing by either end).
        let t = x / if up { hi } else { neg };
        let t = if (up && pos_ok) || (!up && neg_ok) {
            t
        } else {
            0.0
        };
        let i = round_non_negative(127.5 + 127.5 * t.clamp(-1.0, 1.0));
        *o = if v.is_finite() { i as u8 } else { 128 };
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn grey8_avx2(values: &[f32], out: &mut [u8], lo: f64, span: f64, d: f64) {
    grey_body(values, out, lo, span, d, |x| x as u8)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn diverging_avx2(values: &[f32], out: &mut [u8], lo: f64, hi: f64) {
    diverging_body(values, out, lo, hi)
}

fn grey8(values: &[f32], out: &mut [u8], lo: f64, span: f64, d: f64) {
    #[cfg(target_arch = "x86_64")]
    if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        return unsafe { grey8_avx2(values, out, lo, span, d) };
    }
    grey_body(values, out, lo, span, d, |x| x as u8)
}

fn diverging(values: &[f32], out: &mut [u8], lo: f64, hi: f64) {
    #[cfg(target_arch = "x86_64")]
    if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        return unsafe { diverging_avx2(values, out, lo, hi) };
    }
    diverging_body(values, out, lo, hi)
}

/// Renders an `h × w` map with a mapping, rows in parallel: grey levels, or
/// indices into the diverging table.
///
/// # Panics
/// When `values` does not hold `h × w` samples.
pub fn render(values: &[f32], h: usize, w: usize, m: &ViewMapping) -> ViewImage {
    use rayon::prelude::*;
    assert_eq!(
        values.len(),
        h * w,
        "a {h}×{w} view needs {} samples, given {}",
        h * w,
        values.len()
    );
    let (lo, hi) = (m.lo, m.hi);
    let chunk = 1 << 16;
    let (wu, hu) = (w as u32, h as u32);
    match m.scale {
        Scale::Grey => {
            let span = if hi > lo { hi - lo } else { 1.0 };
            let d = m.levels as f64;
            if m.levels > 255 {
                let mut out = vec![0u16; h * w];
                out.par_chunks_mut(chunk)
                    .zip(values.par_chunks(chunk))
                    .for_each(|(o, v)| grey_body(v, o, lo, span, d, |x| x as u16));
                ViewImage::Grey16(ImageBuffer::from_raw(wu, hu, out).expect("sized"))
            } else {
                let mut out = vec![0u8; h * w];
                out.par_chunks_mut(chunk)
                    .zip(values.par_chunks(chunk))
                    .for_each(|(o, v)| grey8(v, o, lo, span, d));
                ViewImage::Grey8(ImageBuffer::from_raw(wu, hu, out).expect("sized"))
            }
        }
        Scale::Diverging => {
            let mut out = vec![0u8; h * w];
            out.par_chunks_mut(chunk)
                .zip(values.par_chunks(chunk))
                .for_each(|(o, v)| diverging(v, o, lo, hi));
            ViewImage::Indexed(ImageBuffer::from_raw(wu, hu, out).expect("sized"))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The view rules as first written: per pixel, with the library's round.
    fn plain_level(v: f32, m: &ViewMapping) -> u32 {
        let (lo, hi) = (m.lo, m.hi);
        if m.scale == Scale::Grey {
            let span = if hi > lo { hi - lo } else { 1.0 };
            let d = m.levels as f64;
            if v.is_finite() {
                ((v as f64 - lo) / span * d).round().clamp(0.0, d) as u32
            } else {
                0
            }
        } else {
            if !v.is_finite() {
                return 128;
            }
            let v = v as f64;
            let t = if v >= 0.0 {
                if hi > 0.0 {
                    v / hi
                } else {
                    0.0
                }
            } else if lo < 0.0 {
                v / -lo
            } else {
                0.0
            };
            (127.5 + 127.5 * t.clamp(-1.0, 1.0)).round() as u32
        }
    }

    #[test]
    fn vector_loops_give_the_plain_rule_pixel_for_pixel() {
        let mut seed = 11u64;
        let mut values: Vec<f32> = (0..200_003)
            .map(|_| {
                seed = seed.wrapping_mul(6364136223846793005).wrapping_add(1);
                ((seed >> 40) as f32 / (1u64 << 24) as f32) * 6.0 - 3.0
            })
            .collect();
        values.extend([
            f32::NAN,
            f32::INFINITY,
            -f32::INFINITY,
            0.0,
            -0.0,
            1.5,
            -1.5,
        ]);
        let n = values.len();
        for (signed, range, depth16) in [
            (false, None, false),
            (false, Some((-1.0, 2.0)), false),
            (false, Some((0.0, 2.5)), true),
            (true, None, false),
            (true, Some((-0.5, 3.0)), false),
            (true, Some((0.5, 3.0)), false),
        ] {
            let m = mapping(&values, signed, range, depth16);
            let got: Vec<u32> = match render(&values, 1, n, &m) {
                ViewImage::Grey8(g) | ViewImage::Indexed(g) => {
                    g.as_raw().iter().map(|&v| v as u32).collect()
                }
                ViewImage::Grey16(g) => g.as_raw().iter().map(|&v| v as u32).collect(),
            };
            for (i, (&v, &g)) in values.iter().zip(&got).enumerate() {
                assert_eq!(g, plain_level(v, &m), "sample {i} = {v} under {m:?}");
            }
        }
    }

    #[test]
    fn fast_rounding_equals_the_library_round() {
        let mut x = 0.0f64;
        let awkward = [
            0.49999999999999994,
            0.5,
            1.5,
            2.5,
            254.5,
            254.49999999999997,
            65534.5,
            127.5,
        ];
        for a in awkward {
            assert_eq!(round_non_negative(a), a.round(), "{a}");
        }
        while x < 300.0 {
            assert_eq!(round_non_negative(x), x.round(), "{x}");
            x += 0.0625 + 1e-9;
        }
    }
}
