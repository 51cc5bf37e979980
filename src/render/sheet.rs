//! Sheets: one picture with several views in a labelled grid (all maps of one
//! image, beside its source). Labels use the 8×8 bitmap glyphs of the `font8x8`
//! crate, so no system font is needed.

use image::imageops::{self, FilterType};
use image::{ImageBuffer, Rgb, RgbImage};

/// Largest side of one cell's picture, in pixels.
pub const CELL: u32 = 192;
const MARGIN: u32 = 8;
const LABEL: u32 = 14;
const BACKGROUND: Rgb<u8> = Rgb([30, 33, 36]);
const INK: Rgb<u8> = Rgb([232, 230, 222]);

/// Draws `text` with the 8×8 glyphs at (x, y), clipped to the image; characters
/// outside ASCII show as '?'.
pub fn draw_text(img: &mut RgbImage, x: u32, y: u32, text: &str, ink: Rgb<u8>) {
    for (i, ch) in text.chars().enumerate() {
        let code = if ch.is_ascii() {
            ch as usize
        } else {
            b'?' as usize
        };
        let glyph = font8x8::legacy::BASIC_LEGACY[code];
        for (gy, row) in glyph.iter().enumerate() {
            for gx in 0..8 {
                if row & (1 << gx) != 0 {
                    let (px, py) = (x + i as u32 * 8 + gx, y + gy as u32);
                    if px < img.width() && py < img.height() {
                        img.put_pixel(px, py, ink);
                    }
                }
            }
        }
    }
}

/// Scales a picture to fit a `CELL × CELL` box: nearest neighbour when enlarging
/// (so small maps keep visible pixels), a triangle filter when shrinking.
pub fn fit(img: &RgbImage) -> RgbImage {
    let (w, h) = img.dimensions();
    let s = CELL as f64 / w.max(h) as f64;
    let (nw, nh) = (
        ((w as f64 * s).round() as u32).max(1),
        ((h as f64 * s).round() as u32).max(1),
    );
    if s >= 1.0 {
        let k = s.floor().max(1.0) as u32;
        imageops::resize(img, w * k, h * k, FilterType::Nearest)
    } else {
        imageops::resize(img, nw, nh, FilterType::Triangle)
    }
}

/// Lays out labelled pictures in a near-square grid under a title.
pub fn sheet(title: &str, cells: &[(String, RgbImage)]) -> RgbImage {
    let n = cells.len().max(1);
    sheet_with_columns(title, cells, (n as f64).sqrt().ceil() as usize)
}

/// Lays out labelled pictures in a grid of `cols` columns under a title.
pub fn sheet_with_columns(title: &str, cells: &[(String, RgbImage)], cols: usize) -> RgbImage {
    let n = cells.len().max(1) as u32;
    let cols = (cols.max(1) as u32).min(n);
    let rows = n.div_ceil(cols);
    let fitted: Vec<(String, RgbImage)> = cells.iter().map(|(l, i)| (l.clone(), fit(i))).collect();
    let cw = fitted.iter().map(|(_, i)| i.width()).max().unwrap_or(CELL);
    let ch = fitted.iter().map(|(_, i)| i.height()).max().unwrap_or(CELL);
    let width = (MARGIN + cols * (cw + MARGIN)).max(MARGIN * 2 + 8 * title.chars().count() as u32);
    let height = MARGIN + LABEL + rows * (ch + LABEL + MARGIN);
    let mut out: RgbImage = ImageBuffer::from_pixel(width, height, BACKGROUND);
    draw_text(&mut out, MARGIN, MARGIN / 2 + 1, title, INK);
    for (k, (label, pic)) in fitted.iter().enumerate() {
        let (c, r) = (k as u32 % cols, k as u32 / cols);
        let x = MARGIN + c * (cw + MARGIN);
        let y = MARGIN + LABEL + r * (ch + LABEL + MARGIN);
        imageops::replace(&mut out, pic, x as i64, y as i64);
        let max_chars = (cw / 8).max(1) as usize;
        let text: String = if label.chars().count() > max_chars {
            label
                .chars()
                .take(max_chars.saturating_sub(1))
                .chain(std::iter::once('~'))
                .collect()
        } else {
            label.clone()
        };
        draw_text(&mut out, x, y + pic.height() + 3, &text, INK);
    }
    out
}
