//! Pictures for people: views of single maps, the diverging colour scale, and sheets.

pub mod colormap;
pub mod sheet;
pub mod taps;
pub mod text;
pub mod view;

use std::path::Path;

use image::codecs::png::{CompressionType, FilterType, PngEncoder};
use image::{ExtendedColorType, ImageEncoder};

use crate::error::Error;
use crate::image_io::atomic::write_atomic;

/// Writes an 8-bit RGB picture as PNG, atomically (see [`write_png`]).
pub fn write_rgb(path: &Path, img: &image::RgbImage) -> Result<(), Error> {
    write_png(
        path,
        img.as_raw(),
        img.width(),
        img.height(),
        ExtendedColorType::Rgb8,
    )
}

/// Writes PNG bytes atomically with fast compression (zlib level 1 was measured
/// several times faster than the default with files no larger; the PNG encoder
/// otherwise dominates a batch run).
pub fn write_png(
    path: &Path,
    bytes: &[u8],
    w: u32,
    h: u32,
    color: ExtendedColorType,
) -> Result<(), Error> {
    write_atomic(path, |out| {
        PngEncoder::new_with_quality(out, CompressionType::Fast, FilterType::Adaptive)
            .write_image(bytes, w, h, color)
            .map_err(std::io::Error::other)
    })
}

/// How views are compressed: a choice of size against time, measured with
/// `cargo run --release --example view_png -- MAPS.npy` on line captures and
/// 4096² maps (grey and signed, 8-bit): `Fast` (fdeflate's fastest mode with
/// the Up filter) took 6–28 ms a map for 0.37–0.67 bytes a pixel; `Small`
/// (zlib level 6, adaptive filters) 170–2240 ms for 2–7 % smaller files.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ViewPng {
    /// Fastest, files a few per cent larger (the default).
    #[default]
    Fast,
    /// Smaller files, tens of times slower.
    Small,
}

impl std::str::FromStr for ViewPng {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "fast" => Ok(ViewPng::Fast),
            "small" => Ok(ViewPng::Small),
            o => Err(format!("unknown PNG setting '{o}'; expected fast or small")),
        }
    }
}

impl std::fmt::Display for ViewPng {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            ViewPng::Fast => "fast",
            ViewPng::Small => "small",
        })
    }
}

/// Writes a view as PNG, atomically: grey as 8- or 16-bit grey, diverging and
/// cyclic as 8-bit indexed colour with `table` (that scale's) as its palette.
pub fn write_view(
    path: &Path,
    v: &view::ViewImage,
    table: &[[u8; 3]],
    png: ViewPng,
) -> Result<(), Error> {
    use ::png::{BitDepth, ColorType, DeflateCompression, Filter};
    let (w, h) = v.dimensions();
    write_atomic(path, |out| {
        let mut e = ::png::Encoder::new(out, w, h);
        match png {
            ViewPng::Fast => {
                e.set_deflate_compression(DeflateCompression::FdeflateUltraFast);
                e.set_filter(Filter::Up);
            }
            ViewPng::Small => {
                e.set_deflate_compression(DeflateCompression::Level(6));
                e.set_filter(Filter::Adaptive);
            }
        }
        let palette: Vec<u8>;
        let wide: Vec<u8>;
        let data: &[u8] = match v {
            view::ViewImage::Grey8(g) => {
                e.set_color(ColorType::Grayscale);
                e.set_depth(BitDepth::Eight);
                g.as_raw()
            }
            view::ViewImage::Grey16(g) => {
                e.set_color(ColorType::Grayscale);
                e.set_depth(BitDepth::Sixteen);
                // PNG stores 16-bit samples big-endian.
                wide = g.as_raw().iter().flat_map(|v| v.to_be_bytes()).collect();
                &wide
            }
            view::ViewImage::Indexed(i) | view::ViewImage::Cyclic(i) => {
                e.set_color(ColorType::Indexed);
                e.set_depth(BitDepth::Eight);
                palette = table.iter().flatten().copied().collect();
                e.set_palette(palette.as_slice());
                i.as_raw()
            }
        };
        e.write_header()
            .and_then(|mut w| w.write_image_data(data))
            .map_err(std::io::Error::other)
    })
}

/// The input image as people see it: r, g, b channels in colour, anything else as
/// grey; integer inputs as read (0–1 to 0–255), float inputs stretched from their
/// minimum to their maximum.
pub fn input_picture(img: &crate::image_io::LoadedImage) -> image::RgbImage {
    let (c, h, w) = img.data.dim();
    region_picture(img, (0, 0, h, w), c)
}

/// Display range of an input: (0, 1) for integer samples, min–max for float.
pub fn display_range(img: &crate::image_io::LoadedImage) -> (f32, f32) {
    if img.meta.float {
        let f = img.data.iter().copied().filter(|v| v.is_finite());
        let lo = f.clone().fold(f32::INFINITY, f32::min);
        let hi = f.fold(f32::NEG_INFINITY, f32::max);
        if hi > lo {
            return (lo, hi);
        }
    }
    (0.0, 1.0)
}

/// Pixel colour of background outside the image in patch pictures.
pub const OUTSIDE: [[u8; 3]; 2] = [[150, 40, 60], [90, 24, 36]];

/// A region of the input, rows y0.. y0+h and columns x0.. x0+w (which may reach
/// outside the image: those pixels are drawn as a dark red hatch).
pub fn region_picture(
    img: &crate::image_io::LoadedImage,
    (y0, x0, h, w): (isize, isize, usize, usize),
    channels: usize,
) -> image::RgbImage {
    let (_, ih, iw) = img.data.dim();
    let (lo, hi) = display_range(img);
    let to8 = |v: f32| (((v - lo) / (hi - lo)).clamp(0.0, 1.0) * 255.0).round() as u8;
    image::ImageBuffer::from_fn(w as u32, h as u32, |x, y| {
        let (yy, xx) = (y0 + y as isize, x0 + x as isize);
        if yy < 0 || xx < 0 || yy as usize >= ih || xx as usize >= iw {
            return image::Rgb(OUTSIDE[((x + y) / 2 % 2) as usize]);
        }
        let (yy, xx) = (yy as usize, xx as usize);
        if channels == 3 {
            image::Rgb([
                to8(img.data[[0, yy, xx]]),
                to8(img.data[[1, yy, xx]]),
                to8(img.data[[2, yy, xx]]),
            ])
        } else {
            let v = to8(img.data[[0, yy, xx]]);
            image::Rgb([v, v, v])
        }
    })
}

/// The box drawn round the largest component on pictures for people: a
/// bright line inside a dark one, one pixel each, so it shows on any scale.
pub const BOX: [[u8; 3]; 2] = [[255, 236, 64], [20, 20, 20]];

/// Draws the box round `l` (map pixels) on a picture shrunk by `factor`,
/// one pixel outside the component, clipped to the picture.
pub fn mark_box(img: &mut image::RgbImage, l: &crate::regions::Largest, factor: u32) {
    use imageproc::drawing::draw_hollow_rect_mut;
    use imageproc::rect::Rect;
    let f = factor.max(1);
    let (x0, y0) = ((l.x0 / f) as i32, (l.y0 / f) as i32);
    let (x1, y1) = ((l.x1 / f) as i32, (l.y1 / f) as i32);
    for (grow, colour) in [(1, BOX[0]), (2, BOX[1])] {
        let (w, h) = (x1 - x0 + 1 + 2 * grow, y1 - y0 + 1 + 2 * grow);
        let r = Rect::at(x0 - grow, y0 - grow).of_size(w as u32, h as u32);
        draw_hollow_rect_mut(img, r, image::Rgb(colour));
    }
}
