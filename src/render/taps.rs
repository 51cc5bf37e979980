//! Pictures of kernels' taps: one pixel per tap, enlarged with nearest neighbour
//! in sheets so each tap is a visible square.
//!
//! Each kernel is scaled symmetrically around zero by its own largest |tap| m.
//! One-plane kernels use the diverging scale (zero at its light centre); three-
//! plane kernels are drawn in colour, channel c = 128 + 127·t_c/m, so mid-grey
//! means zero; other plane counts show their planes side by side.

use image::{Rgb, RgbImage};

use crate::kernel::{Bank, Kernel};
use crate::render::colormap;
use crate::render::sheet::{draw_text, sheet};

/// Largest |tap| over all planes (1 for an all-zero kernel).
pub fn extreme(k: &Kernel) -> f64 {
    let m = k
        .planes
        .iter()
        .flatten()
        .fold(0.0f64, |a, t| a.max(t.abs()));
    if m > 0.0 {
        m
    } else {
        1.0
    }
}

/// The taps of one kernel, one pixel per tap.
///
/// # Panics
/// When a plane does not hold rows × cols taps ([`Kernel::validate`] says why)
/// or `table` does not have 256 entries.
pub fn taps_picture(k: &Kernel, table: &[[u8; 3]]) -> RgbImage {
    assert!(
        k.planes.iter().all(|p| p.len() == k.rows * k.cols),
        "kernel '{}' has a plane that is not {}×{}",
        k.name,
        k.rows,
        k.cols
    );
    assert_eq!(table.len(), 256, "the diverging table has 256 entries");
    let m = extreme(k);
    let (h, w) = (k.rows as u32, k.cols as u32);
    let div = |t: f64| Rgb(table[(127.5 + 127.5 * (t / m).clamp(-1.0, 1.0)).round() as usize]);
    if k.channels() == 3 {
        return RgbImage::from_fn(w, h, |x, y| {
            let i = (y * w + x) as usize;
            let c = |p: usize| {
                (128.0 + 127.0 * (k.planes[p][i] / m))
                    .round()
                    .clamp(0.0, 255.0) as u8
            };
            Rgb([c(0), c(1), c(2)])
        });
    }
    let n = k.channels() as u32;
    let gap = u32::from(n > 1);
    RgbImage::from_fn(n * w + (n - 1) * gap, h, |x, y| {
        let (p, px) = (x / (w + gap), x % (w + gap));
        if px >= w {
            return Rgb([30, 33, 36]);
        }
        div(k.planes[p as usize][(y * w + px) as usize])
    })
}

/// A kernel's taps enlarged to about a sheet cell, each tap a square with a
/// one-pixel grid line between neighbours; with `values`, each tap's value
/// written in its square when the squares are wide enough (kernels of up to
/// 9 × 9 taps, one plane), dark on light taps and light on dark ones.
pub fn taps_cell(k: &Kernel, table: &[[u8; 3]], values: bool) -> RgbImage {
    use crate::render::text::{text_width, LINE};
    let small = taps_picture(k, table);
    let (w, h) = small.dimensions();
    let s = (crate::render::sheet::CELL / w.max(h).max(1)).max(1);
    if s < 3 {
        return small;
    }
    let grid = Rgb([30, 33, 36]);
    let mut out = RgbImage::from_fn(w * s + 1, h * s + 1, |x, y| {
        if x % s == 0 || y % s == 0 {
            grid
        } else {
            *small.get_pixel((x / s).min(w - 1), (y / s).min(h - 1))
        }
    });
    if values && k.channels() == 1 && k.rows <= 9 && k.cols <= 9 {
        for ty in 0..k.rows {
            for tx in 0..k.cols {
                let v = k.planes[0][ty * k.cols + tx] * k.scale;
                let text = short_signed(v);
                let tw = text_width(&text);
                if tw + 4 > s || LINE + 2 > s {
                    continue;
                }
                let c = small.get_pixel(tx as u32, ty as u32).0;
                let light =
                    0.2126 * f64::from(c[0]) + 0.7152 * f64::from(c[1]) + 0.0722 * f64::from(c[2]);
                let ink = if light > 140.0 {
                    Rgb([20, 22, 26])
                } else {
                    Rgb([240, 240, 236])
                };
                let x = tx as u32 * s + (s - tw) / 2;
                let y = ty as u32 * s + (s - LINE) / 2;
                draw_text(&mut out, x, y, &text, ink);
            }
        }
    }
    out
}

/// A tap value in at most about four characters.
fn short_signed(v: f64) -> String {
    if v == v.round() && v.abs() < 1000.0 {
        format!("{}", v as i64)
    } else if v.abs() >= 0.01 && v.abs() < 100.0 {
        let t = format!("{v:.2}");
        let t = t.trim_end_matches('0').trim_end_matches('.').to_string();
        t.replace("0.", ".")
    } else {
        format!("{v:.0e}")
    }
}

/// A sheet of every kernel of a bank, with a legend of the scale below.
pub fn draw_bank(bank: &Bank) -> RgbImage {
    draw_bank_with(bank, false)
}

/// [`draw_bank`], with each small kernel's tap values in its squares when
/// `values`.
pub fn draw_bank_with(bank: &Bank, values: bool) -> RgbImage {
    let table = colormap::table();
    let cells: Vec<(String, RgbImage)> = bank
        .kernels
        .iter()
        .map(|k| {
            (
                format!("{} ±{}", k.name, short(extreme(k))),
                taps_cell(k, &table, values),
            )
        })
        .collect();
    let title = format!(
        "bank {}: {} kernel(s), {}",
        bank.name,
        bank.kernels.len(),
        bank.op
    );
    let grid = sheet(&title, &cells);
    let legend_h = 54;
    let mut out = RgbImage::from_pixel(
        grid.width().max(300),
        grid.height() + legend_h,
        Rgb([30, 33, 36]),
    );
    image::imageops::replace(&mut out, &grid, 0, 0);
    let (x0, y0) = (8u32, grid.height() + 4);
    let ink = Rgb([232, 230, 222]);
    let three = bank.kernels.first().is_some_and(|k| k.channels() == 3);
    for x in 0..256u32 {
        let t = x as f64 / 255.0 * 2.0 - 1.0;
        let c = if three {
            let v = (128.0 + 127.0 * t).round() as u8;
            Rgb([v, v, v])
        } else {
            Rgb(table[x as usize])
        };
        for y in 0..12 {
            out.put_pixel(x0 + x, y0 + y, c);
        }
    }
    draw_text(&mut out, x0, y0 + 16, "-max", ink);
    let zero = crate::render::text::text_width("0") / 2;
    draw_text(&mut out, x0 + 128 - zero, y0 + 16, "0", ink);
    let plus = crate::render::text::text_width("+max");
    draw_text(&mut out, x0 + 256 - plus, y0 + 16, "+max", ink);
    let note = if three {
        "rgb planes, grey = 0"
    } else {
        "each kernel: own ±max"
    };
    draw_text(&mut out, x0, y0 + 16 + crate::render::text::LINE, note, ink);
    out
}

fn short(v: f64) -> String {
    if (0.01..1000.0).contains(&v) {
        let s = format!("{v:.3}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        format!("{v:.2e}")
    }
}
