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
//!   map's largest |value|. Signed views are 8-bit colour at any `--view-depth`.
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
    /// 8-bit colour.
    Rgb8(ImageBuffer<Rgb<u8>, Vec<u8>>),
}

impl ViewImage {
    /// As 8-bit RGB (for sheets).
    pub fn to_rgb8(&self) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
        match self {
            ViewImage::Grey8(g) => image::DynamicImage::ImageLuma8(g.clone()).to_rgb8(),
            ViewImage::Grey16(g) => image::DynamicImage::ImageLuma16(g.clone()).to_rgb8(),
            ViewImage::Rgb8(c) => c.clone(),
        }
    }
}

/// Chooses the mapping for a map.
pub fn mapping(
    values: &[f32],
    signed: bool,
    range: Option<(f32, f32)>,
    depth16: bool,
) -> ViewMapping {
    let finite = values.iter().copied().filter(|v| v.is_finite());
    let (lo, hi) = match range {
        Some((lo, hi)) => (lo as f64, hi as f64),
        None if signed => {
            let m = finite.fold(0.0f32, |m, v| m.max(v.abs())) as f64;
            (-m, m)
        }
        None => (0.0, finite.fold(0.0f32, f32::max) as f64),
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

/// Renders an `h × w` map with a mapping; `table` is the diverging colour table.
///
/// # Panics
/// When `values` does not hold `h × w` samples or `table` is empty.
pub fn render(values: &[f32], h: usize, w: usize, m: &ViewMapping, table: &[[u8; 3]]) -> ViewImage {
    assert_eq!(
        values.len(),
        h * w,
        "a {h}×{w} view needs {} samples, given {}",
        h * w,
        values.len()
    );
    assert!(!table.is_empty(), "the colour table is empty");
    let (lo, hi) = (m.lo, m.hi);
    if m.scale == Scale::Grey {
        let span = if hi > lo { hi - lo } else { 1.0 };
        let d = m.levels as f64;
        let level = |v: f32| -> f64 {
            if v.is_finite() {
                ((v as f64 - lo) / span * d).round().clamp(0.0, d)
            } else {
                0.0
            }
        };
        if m.levels > 255 {
            ViewImage::Grey16(ImageBuffer::from_fn(w as u32, h as u32, |x, y| {
                Luma([level(values[y as usize * w + x as usize]) as u16])
            }))
        } else {
            ViewImage::Grey8(ImageBuffer::from_fn(w as u32, h as u32, |x, y| {
                Luma([level(values[y as usize * w + x as usize]) as u8])
            }))
        }
    } else {
        let index = |v: f32| -> usize {
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
            (127.5 + 127.5 * t.clamp(-1.0, 1.0)).round() as usize
        };
        ViewImage::Rgb8(ImageBuffer::from_fn(w as u32, h as u32, |x, y| {
            Rgb(table[index(values[y as usize * w + x as usize]).min(table.len() - 1)])
        }))
    }
}
