//! Sheets: one picture with several views in a labelled grid (all maps of one
//! image, beside its source). Text is drawn with the bundled font
//! ([`crate::render::text`]); labels wrap onto more lines, never cut short.

use image::imageops::{self, FilterType};
use image::{ImageBuffer, Rgb, RgbImage};

pub use crate::render::text::draw_text;
use crate::render::text::{text_width, wrap, LINE};

/// Largest side of one cell's picture, in pixels.
pub const CELL: u32 = 192;
const MARGIN: u32 = 8;
const BACKGROUND: Rgb<u8> = Rgb([30, 33, 36]);
const INK: Rgb<u8> = Rgb([232, 230, 222]);

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
/// Labels wrap to their cell's width; every row of cells is as tall as its
/// longest label needs.
pub fn sheet_with_columns(title: &str, cells: &[(String, RgbImage)], cols: usize) -> RgbImage {
    let n = cells.len().max(1) as u32;
    let cols = (cols.max(1) as u32).min(n);
    let rows = n.div_ceil(cols);
    let fitted: Vec<(String, RgbImage)> = cells.iter().map(|(l, i)| (l.clone(), fit(i))).collect();
    let cw = fitted.iter().map(|(_, i)| i.width()).max().unwrap_or(CELL);
    let ch = fitted.iter().map(|(_, i)| i.height()).max().unwrap_or(CELL);
    let labels: Vec<Vec<String>> = fitted.iter().map(|(l, _)| wrap(l, cw)).collect();
    let row_lines: Vec<u32> = (0..rows)
        .map(|r| {
            labels
                .iter()
                .skip((r * cols) as usize)
                .take(cols as usize)
                .map(|l| l.len() as u32)
                .max()
                .unwrap_or(1)
        })
        .collect();
    let title_lines = wrap(title, (MARGIN + cols * (cw + MARGIN)).max(640) - 2 * MARGIN);
    let title_w = title_lines.iter().map(|l| text_width(l)).max().unwrap_or(0);
    let width = (MARGIN + cols * (cw + MARGIN)).max(MARGIN * 2 + title_w);
    let top = MARGIN + title_lines.len() as u32 * LINE;
    let height = top
        + row_lines
            .iter()
            .map(|l| ch + 3 + l * LINE + MARGIN)
            .sum::<u32>();
    let mut out: RgbImage = ImageBuffer::from_pixel(width, height, BACKGROUND);
    for (i, line) in title_lines.iter().enumerate() {
        draw_text(&mut out, MARGIN, MARGIN / 2 + i as u32 * LINE, line, INK);
    }
    let mut y = top;
    for r in 0..rows {
        for c in 0..cols {
            let k = (r * cols + c) as usize;
            let Some((_, pic)) = fitted.get(k) else { break };
            let x = MARGIN + c * (cw + MARGIN);
            imageops::replace(&mut out, pic, x as i64, y as i64);
            for (i, line) in labels[k].iter().enumerate() {
                draw_text(
                    &mut out,
                    x,
                    y + pic.height() + 3 + i as u32 * LINE,
                    line,
                    INK,
                );
            }
        }
        y += ch + 3 + row_lines[r as usize] * LINE + MARGIN;
    }
    out
}
