//! Pictures for people: views of single maps, the diverging colour scale, and sheets.

pub mod colormap;
pub mod sheet;
pub mod view;

use std::path::Path;

use image::codecs::png::{CompressionType, FilterType, PngEncoder};
use image::{ExtendedColorType, ImageEncoder};

use crate::error::Error;
use crate::io::atomic::write_atomic;

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

/// Writes a view as PNG.
pub fn write_view(path: &Path, v: &view::ViewImage) -> Result<(), Error> {
    match v {
        view::ViewImage::Grey8(g) => write_png(
            path,
            g.as_raw(),
            g.width(),
            g.height(),
            ExtendedColorType::L8,
        ),
        view::ViewImage::Grey16(g) => {
            // The encoder takes native-endian samples and writes PNG's big-endian.
            let bytes: Vec<u8> = g.as_raw().iter().flat_map(|v| v.to_ne_bytes()).collect();
            write_png(path, &bytes, g.width(), g.height(), ExtendedColorType::L16)
        }
        view::ViewImage::Rgb8(c) => write_png(
            path,
            c.as_raw(),
            c.width(),
            c.height(),
            ExtendedColorType::Rgb8,
        ),
    }
}
