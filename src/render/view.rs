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
//! - **Cyclic maps** (orientations in degrees) use the cyclic scale of
//!   [`super::colormap::cyclic_table`], whose ends meet: table index i (0–255)
//!   stands for v = lo + i/256·(hi − lo), lo and hi being one direction
//!   (−180 and 180 for a gradient orientation, 0 and 180 for kernel angles).
//!   Written as indexed PNG like signed views; `--view-range` does not change them.
//!
//! `--view-range LO,HI` fixes lo and hi for every other map. Non-finite samples are drawn
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
    /// The cyclic scale: lo and hi are the same colour.
    Cyclic,
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
    /// Indices into the cyclic table, written the same way.
    Cyclic(ImageBuffer<Luma<u8>, Vec<u8>>),
}

impl ViewImage {
    /// As 8-bit RGB (for sheets); `table` is the diverging colour table.
    pub fn to_rgb8(&self, table: &[[u8; 3]]) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
        match self {
            ViewImage::Grey8(g) => image::DynamicImage::ImageLuma8(g.clone()).to_rgb8(),
            ViewImage::Grey16(g) => image::DynamicImage::ImageLuma16(g.clone()).to_rgb8(),
            ViewImage::Indexed(i) | ViewImage::Cyclic(i) => {
                ImageBuffer::from_fn(i.width(), i.height(), |x, y| {
                    Rgb(table[i.get_pixel(x, y)[0] as usize])
                })
            }
        }
    }

    /// Width and height.
    pub fn dimensions(&self) -> (u32, u32) {
        match self {
            ViewImage::Grey8(g) | ViewImage::Indexed(g) | ViewImage::Cyclic(g) => g.dimensions(),
            ViewImage::Grey16(g) => g.dimensions(),
        }
    }

    /// The whole factor [`ViewImage::cell`] shrinks by (1: not shrunk).
    pub fn cell_factor(&self) -> u32 {
        let (w, h) = self.dimensions();
        w.max(h).max(1).div_ceil(crate::render::sheet::MAX_CELL)
    }
}

impl ViewImage {
    /// The picture for a sheet cell: at most [`crate::render::sheet::MAX_CELL`]
    /// on its longer side, shrunk by a whole factor n with each pixel the mean
    /// *level* of an n × n block, coloured afterwards. Levels stand linearly for
    /// values, so the cell shows the blocks' mean values; averaging colours
    /// instead would mix a diverging scale's two hues into colours it does not
    /// hold.
    /// A cyclic view's blocks take the circular mean of their indices, so
    /// directions either side of the seam do not average to the opposite one.
    pub fn cell(&self, table: &[[u8; 3]]) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
        let (w, h) = self.dimensions();
        let n = self.cell_factor();
        if n <= 1 {
            return self.to_rgb8(table);
        }
        if let ViewImage::Cyclic(g) = self {
            let step = std::f64::consts::TAU / 256.0;
            return ImageBuffer::from_fn(w.div_ceil(n), h.div_ceil(n), |x, y| {
                let (mut c, mut s) = (0.0f64, 0.0f64);
                for yy in y * n..((y + 1) * n).min(h) {
                    for xx in x * n..((x + 1) * n).min(w) {
                        let a = f64::from(g.get_pixel(xx, yy)[0]) * step;
                        c += a.cos();
                        s += a.sin();
                    }
                }
                let i = (s.atan2(c) / step).round().rem_euclid(256.0) as usize;
                Rgb(table[i % 256])
            });
        }
        let level = |x: u32, y: u32| -> f64 {
            match self {
                ViewImage::Grey8(g) | ViewImage::Indexed(g) | ViewImage::Cyclic(g) => {
                    f64::from(g.get_pixel(x, y)[0])
                }
                ViewImage::Grey16(g) => f64::from(g.get_pixel(x, y)[0]) / 257.0,
            }
        };
        let indexed = matches!(self, ViewImage::Indexed(_));
        ImageBuffer::from_fn(w.div_ceil(n), h.div_ceil(n), |x, y| {
            let (mut sum, mut count) = (0.0, 0.0);
            for yy in y * n..((y + 1) * n).min(h) {
                for xx in x * n..((x + 1) * n).min(w) {
                    sum += level(xx, yy);
                    count += 1.0;
                }
            }
            let l = (sum / count).round().clamp(0.0, 255.0) as u8;
            if indexed {
                Rgb(table[l as usize])
            } else {
                Rgb([l, l, l])
            }
        })
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

/// The mapping of a cyclic map whose period runs from `lo` to `hi`.
pub fn cyclic_mapping(lo: f64, hi: f64) -> ViewMapping {
    ViewMapping {
        scale: Scale::Cyclic,
        lo,
        hi,
        levels: 255,
    }
}

/// Cyclic table indices: round((v − lo)/(hi − lo)·256) mod 256, for v in
/// [lo, hi] (values outside are taken as the nearest end); non-finite samples
/// take index 0. In f32 with a truncation, so the loop vectorises.
fn cyclic(values: &[f32], out: &mut [u8], lo: f64, hi: f64) {
    let k = (256.0 / if hi > lo { hi - lo } else { 1.0 }) as f32;
    let lo = lo as f32;
    for (o, v) in out.iter_mut().zip(values) {
        // NaN fails the clamp's comparisons and becomes 0 in the cast.
        let q = ((*v - lo) * k).clamp(0.0, 256.0);
        *o = ((q + 0.5) as i32 & 255) as u8;
    }
}

/// `x.round()` for x in [0, 2³¹): half away from zero, as `f64::round`, with
/// an integer conversion instead of the library call `round` is without
/// SSE4.1 (the release build targets every x86-64), so the loops vectorise.
/// The fraction x − ⌊x⌋ is exact in f64 for such x, so the result is too.
#[inline(always)]
fn round_non_negative(x: f64) -> f64 {
    round_level(x) as f64
}

/// [`round_non_negative`] as a whole number, for the levels themselves: kept
/// in integers from the conversion on, so the loops stay in vector registers.
#[inline(always)]
fn round_level(x: f64) -> i32 {
    let i = x as i32;
    i + i32::from(x - i as f64 >= 0.5)
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

/// Whether `y`, about to be rounded, lies so near a half that a last-bit
/// difference in how it was computed could change the result (the two rules
/// differ by at most a few ulps of values below 65,536: under 1e-10).
#[inline(always)]
fn near_half(y: f64) -> bool {
    let f = y - (y as i32 as f64);
    (f - 0.5).abs() < 1e-9
}

/// [`grey_body`] with a multiplication by d/span instead of a division by span:
/// about three times faster, and the same level unless the value lies within
/// 1e-9 of a half (the two differ by a few ulps, at most 1e-10 here), which it
/// reports so that the caller recomputes with the exact rule.
#[inline(always)]
fn grey_fast_body(values: &[f32], out: &mut [u8], lo: f64, k: f64, d: f64) -> bool {
    let mut near = false;
    for (o, &v) in out.iter_mut().zip(values) {
        let x = ((v as f64 - lo) * k).clamp(0.0, d);
        let x = if v.is_finite() { x } else { 0.0 };
        near |= near_half(x);
        *o = round_level(x) as u8;
    }
    near
}

/// [`diverging_body`] with a multiplication by the end's reciprocal, reporting
/// values near a half as [`grey_fast_body`] does.
#[inline(always)]
fn diverging_fast_body(values: &[f32], out: &mut [u8], lo: f64, hi: f64) -> bool {
    let (pos_ok, neg_ok) = (hi > 0.0, lo < 0.0);
    let (up_k, down_k) = (1.0 / hi, 1.0 / -lo);
    let mut near = false;
    for (o, &v) in out.iter_mut().zip(values) {
        let x = v as f64;
        let up = x >= 0.0;
        let t = x * if up { up_k } else { down_k };
        let t = if (up && pos_ok) || (!up && neg_ok) {
            t
        } else {
            0.0
        };
        let y = 127.5 + 127.5 * t.clamp(-1.0, 1.0);
        // Zero is exact under both rules (127.5, drawn as 128).
        near |= v.is_finite() && t != 0.0 && near_half(y);
        *o = if v.is_finite() {
            round_level(y) as u8
        } else {
            128
        };
    }
    near
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn grey8_avx2(values: &[f32], out: &mut [u8], lo: f64, k: f64, d: f64) -> bool {
    grey_fast_body(values, out, lo, k, d)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn diverging_avx2(values: &[f32], out: &mut [u8], lo: f64, hi: f64) -> bool {
    diverging_fast_body(values, out, lo, hi)
}

/// 8-bit grey levels of a chunk: the fast rule, and the exact one where a
/// value lies near a half.
fn grey8(values: &[f32], out: &mut [u8], lo: f64, span: f64, d: f64) {
    let k = d / span;
    #[cfg(target_arch = "x86_64")]
    let near = if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        unsafe { grey8_avx2(values, out, lo, k, d) }
    } else {
        grey_fast_body(values, out, lo, k, d)
    };
    #[cfg(not(target_arch = "x86_64"))]
    let near = grey_fast_body(values, out, lo, k, d);
    if near {
        grey_body(values, out, lo, span, d, |x| x as u8);
    }
}

/// Diverging table indices of a chunk: the fast rule, and the exact one where
/// a value lies near a half.
fn diverging(values: &[f32], out: &mut [u8], lo: f64, hi: f64) {
    #[cfg(target_arch = "x86_64")]
    let near = if crate::engine::simd::avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        unsafe { diverging_avx2(values, out, lo, hi) }
    } else {
        diverging_fast_body(values, out, lo, hi)
    };
    #[cfg(not(target_arch = "x86_64"))]
    let near = diverging_fast_body(values, out, lo, hi);
    if near {
        diverging_body(values, out, lo, hi);
    }
}

/// Samples per piece of work when drawing: a piece with a value near a half
/// is redone with the exact rule, so small pieces keep that rare cost small.
const PIECE: usize = 1 << 12;

/// The 8-bit levels of `values` under `m` (grey levels, or diverging table
/// indices), into `out` of the same length; for a view whose mapping has 255
/// levels.
pub fn levels_u8(values: &[f32], out: &mut [u8], m: &ViewMapping) {
    let (lo, hi) = (m.lo, m.hi);
    for (v, o) in values.chunks(PIECE).zip(out.chunks_mut(PIECE)) {
        match m.scale {
            Scale::Grey => grey8(
                v,
                o,
                lo,
                if hi > lo { hi - lo } else { 1.0 },
                m.levels as f64,
            ),
            Scale::Diverging => diverging(v, o, lo, hi),
            Scale::Cyclic => cyclic(v, o, lo, hi),
        }
    }
}

/// The 16-bit grey levels of `values` under a grey mapping of 65535 levels.
pub fn levels_u16(values: &[f32], out: &mut [u16], m: &ViewMapping) {
    let (lo, hi) = (m.lo, m.hi);
    let span = if hi > lo { hi - lo } else { 1.0 };
    grey_body(values, out, lo, span, m.levels as f64, |x| x as u16);
}

/// A view from levels already computed for `m` (by [`levels_u8`] or
/// [`levels_u16`]), `w` wide.
pub fn view_of(m: &ViewMapping, w: usize, h: usize, u8s: Vec<u8>, u16s: Vec<u16>) -> ViewImage {
    let (wu, hu) = (w as u32, h as u32);
    match (m.scale, m.levels > 255) {
        (Scale::Grey, true) => {
            ViewImage::Grey16(ImageBuffer::from_raw(wu, hu, u16s).expect("sized"))
        }
        (Scale::Grey, false) => {
            ViewImage::Grey8(ImageBuffer::from_raw(wu, hu, u8s).expect("sized"))
        }
        (Scale::Diverging, _) => {
            ViewImage::Indexed(ImageBuffer::from_raw(wu, hu, u8s).expect("sized"))
        }
        (Scale::Cyclic, _) => ViewImage::Cyclic(ImageBuffer::from_raw(wu, hu, u8s).expect("sized")),
    }
}

/// Renders an `h × w` map with a mapping, pieces in parallel: grey levels, or
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
    if m.scale == Scale::Grey && m.levels > 255 {
        let mut out = vec![0u16; h * w];
        out.par_chunks_mut(PIECE)
            .zip(values.par_chunks(PIECE))
            .for_each(|(o, v)| levels_u16(v, o, m));
        view_of(m, w, h, Vec::new(), out)
    } else {
        let mut out = vec![0u8; h * w];
        out.par_chunks_mut(PIECE)
            .zip(values.par_chunks(PIECE))
            .for_each(|(o, v)| levels_u8(v, o, m));
        view_of(m, w, h, out, Vec::new())
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
            (false, Some((0.0, 2.0)), false),
            (false, Some((0.0, 3.0)), false),
            (true, Some((-2.0, 2.0)), false),
            (true, Some((-3.0, 3.0)), false),
            (true, None, false),
            (true, Some((-0.5, 3.0)), false),
            (true, Some((0.5, 3.0)), false),
        ] {
            let m = mapping(&values, signed, range, depth16);
            let got: Vec<u32> = match render(&values, 1, n, &m) {
                ViewImage::Grey8(g) | ViewImage::Indexed(g) | ViewImage::Cyclic(g) => {
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
