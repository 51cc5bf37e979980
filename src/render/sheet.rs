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

/// Longest side a cell's picture is shrunk to, in pixels.
pub const MAX_CELL: u32 = 512;

/// A picture at a whole-number scale for a cell: small pictures enlarged by
/// the largest whole factor that keeps them within [`CELL`] (nearest
/// neighbour, so samples stay visible as squares); pictures longer than
/// [`MAX_CELL`] shrunk by a whole factor n, each cell pixel the mean of an
/// n × n block (area averaging: no sample is dropped); the rest as they are.
pub fn fit(img: &RgbImage) -> RgbImage {
    let (w, h) = img.dimensions();
    let side = w.max(h).max(1);
    if side > MAX_CELL {
        let n = side.div_ceil(MAX_CELL);
        return block_mean(img, n);
    }
    let k = (CELL / side).max(1);
    if k > 1 {
        imageops::resize(img, w * k, h * k, FilterType::Nearest)
    } else {
        img.clone()
    }
}

/// The mean of every n × n block (blocks at the right and bottom edges hold
/// what is left).
fn block_mean(img: &RgbImage, n: u32) -> RgbImage {
    let (w, h) = img.dimensions();
    let (ow, oh) = (w.div_ceil(n), h.div_ceil(n));
    ImageBuffer::from_fn(ow, oh, |x, y| {
        let mut sum = [0u32; 3];
        let mut count = 0u32;
        for yy in y * n..((y + 1) * n).min(h) {
            for xx in x * n..((x + 1) * n).min(w) {
                let p = img.get_pixel(xx, yy).0;
                for c in 0..3 {
                    sum[c] += u32::from(p[c]);
                }
                count += 1;
            }
        }
        Rgb(sum.map(|v| ((v + count / 2) / count) as u8))
    })
}

/// A colour key under a cell: the scale's colours from `lo` to `hi`, with the
/// values at both ends (and the middle value where one is given: 0 on a
/// diverging scale, the middle direction on a cyclic one) and the unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Key<'a> {
    /// The diverging table for signed maps; `None` for the grey scale.
    pub table: Option<&'a [[u8; 3]]>,
    /// Value at the left end.
    pub lo: f64,
    /// Value at the right end.
    pub hi: f64,
    /// The value written at the middle, if any.
    pub middle: Option<f64>,
    /// What the values are: `response` for maps, `input` for input patches.
    pub unit: &'static str,
}

/// One cell of a sheet: a picture, its label (wrapped, never cut) and an
/// optional colour key.
#[derive(Debug, Clone)]
pub struct Cell<'a> {
    /// The text under the picture.
    pub label: String,
    /// The picture (scaled by [`fit`]).
    pub picture: RgbImage,
    /// The key under the label.
    pub key: Option<Key<'a>>,
}

/// Height of a key: its bar, the numbers and the unit.
const KEY: u32 = 10 + 2 + 2 * LINE;

/// A value in about three significant digits, for keys and labels.
pub fn short_number(v: f64) -> String {
    let a = v.abs();
    if a == 0.0 || !a.is_finite() {
        format!("{v}")
    } else if (1e-3..1e4).contains(&a) {
        let decimals = (2 - a.log10().floor() as i32).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.2e}")
    }
}

fn draw_key(out: &mut RgbImage, x: u32, y: u32, width: u32, key: &Key) {
    let width = width.max(60);
    for i in 0..width {
        let t = i as f64 / (width - 1).max(1) as f64;
        let c = match key.table {
            Some(tab) => Rgb(tab[(t * (tab.len() - 1) as f64).round() as usize]),
            None => {
                let v = (t * 255.0).round() as u8;
                Rgb([v, v, v])
            }
        };
        for dy in 0..10 {
            if x + i < out.width() && y + dy < out.height() {
                out.put_pixel(x + i, y + dy, c);
            }
        }
    }
    let ny = y + 12;
    let lo = short_number(key.lo);
    let hi = short_number(key.hi);
    draw_text(out, x, ny, &lo, INK);
    let hw = text_width(&hi);
    draw_text(out, (x + width).saturating_sub(hw), ny, &hi, INK);
    if let Some(m) = key.middle {
        let text = short_number(m);
        let zw = text_width(&text);
        draw_text(out, (x + width / 2).saturating_sub(zw / 2), ny, &text, INK);
    }
    draw_text(out, x, ny + LINE, key.unit, INK);
}

/// Lays out labelled pictures in a near-square grid under a title.
pub fn sheet(title: &str, cells: &[(String, RgbImage)]) -> RgbImage {
    let n = cells.len().max(1);
    sheet_with_columns(title, cells, (n as f64).sqrt().ceil() as usize)
}

/// Lays out labelled pictures in a grid of `cols` columns under a title.
pub fn sheet_with_columns(title: &str, cells: &[(String, RgbImage)], cols: usize) -> RgbImage {
    let cells: Vec<Cell> = cells
        .iter()
        .map(|(l, p)| Cell {
            label: l.clone(),
            picture: p.clone(),
            key: None,
        })
        .collect();
    sheet_of(title, &cells, cols)
}

/// Lays out cells in a grid of `cols` columns (a near-square grid when 0)
/// under a title. Labels wrap to their cell's width; every row of cells is as
/// tall as its longest label and its keys need.
pub fn sheet_of(title: &str, cells: &[Cell], cols: usize) -> RgbImage {
    let n = cells.len().max(1) as u32;
    let cols = if cols == 0 {
        (n as f64).sqrt().ceil() as u32
    } else {
        cols as u32
    };
    let cols = cols.clamp(1, n);
    let rows = n.div_ceil(cols);
    let fitted: Vec<RgbImage> = cells.iter().map(|c| fit(&c.picture)).collect();
    let cw = fitted
        .iter()
        .map(RgbImage::width)
        .max()
        .unwrap_or(CELL)
        .max(96);
    let ch = fitted.iter().map(RgbImage::height).max().unwrap_or(CELL);
    let labels: Vec<Vec<String>> = cells.iter().map(|c| wrap(&c.label, cw)).collect();
    let row_height: Vec<u32> = (0..rows)
        .map(|r| {
            let range = (r * cols) as usize..((r + 1) * cols).min(n) as usize;
            let lines = range
                .clone()
                .map(|k| labels[k].len() as u32)
                .max()
                .unwrap_or(1);
            let key = range.clone().any(|k| cells[k].key.is_some());
            ch + 3 + lines * LINE + if key { KEY } else { 0 } + MARGIN
        })
        .collect();
    let title_lines = wrap(title, (MARGIN + cols * (cw + MARGIN)).max(640) - 2 * MARGIN);
    let title_w = title_lines.iter().map(|l| text_width(l)).max().unwrap_or(0);
    let width = (MARGIN + cols * (cw + MARGIN)).max(MARGIN * 2 + title_w);
    let top = MARGIN + title_lines.len() as u32 * LINE;
    let height = top + row_height.iter().sum::<u32>();
    let mut out: RgbImage = ImageBuffer::from_pixel(width, height, BACKGROUND);
    for (i, line) in title_lines.iter().enumerate() {
        draw_text(&mut out, MARGIN, MARGIN / 2 + i as u32 * LINE, line, INK);
    }
    let mut y = top;
    for r in 0..rows {
        for c in 0..cols {
            let k = (r * cols + c) as usize;
            let Some(pic) = fitted.get(k) else { break };
            let x = MARGIN + c * (cw + MARGIN);
            imageops::replace(&mut out, pic, x as i64, y as i64);
            let mut ty = y + pic.height() + 3;
            for line in &labels[k] {
                draw_text(&mut out, x, ty, line, INK);
                ty += LINE;
            }
            if let Some(key) = &cells[k].key {
                draw_key(&mut out, x, ty + 2, pic.width().min(cw), key);
            }
        }
        y += row_height[r as usize];
    }
    out
}
