//! Reading images into `C × H × W` f32 arrays.
//!
//! Integer samples are scaled to [0, 1] by the type's full scale (255 or 65535);
//! float samples are taken as they are. Colour becomes luma with the ITU-R BT.709
//! weights Y = 0.2126 R + 0.7152 G + 0.0722 B (ITU-R Recommendation BT.709-6,
//! item 3.2), applied to the stored (gamma-encoded) values without linearising,
//! as is common practice for luma. Alpha is ignored.

use std::path::Path;

use image::{DynamicImage, ImageReader, Limits};
use ndarray::Array3;

use crate::error::Error;

/// BT.709 luma weights for R, G, B (ITU-R BT.709-6, item 3.2).
pub const BT709: [f32; 3] = [0.2126, 0.7152, 0.0722];

/// Largest width or height decoded.
pub const MAX_SIDE: u32 = 65_535;
/// Largest decoder allocation in bytes.
pub const MAX_ALLOC: u64 = 2 << 30;

/// A decoded image as one luma plane, with what it was.
#[derive(Debug, Clone)]
pub struct LoadedImage {
    /// `1 × H × W` luma in [0, 1] for integer inputs.
    pub data: Array3<f32>,
    /// Bits per sample in the file (8, 16 or 32 for float).
    pub bit_depth: u8,
    /// Colour layout in the file: `grey`, `grey+alpha`, `rgb`, `rgba`.
    pub color: &'static str,
}

fn bad(path: &Path, message: impl Into<String>) -> Error {
    Error::Image {
        path: path.to_path_buf(),
        message: message.into(),
    }
}

/// Reads an image file and returns its luma plane.
pub fn read_luma(path: &Path) -> Result<LoadedImage, Error> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if meta.is_dir() {
        return Err(bad(path, "is a folder, not an image file"));
    }
    if meta.len() == 0 {
        return Err(bad(path, "is empty (0 bytes)"));
    }
    // Trust the content, not the extension: a text file named .png is "not an
    // image", a PNG named .tif still reads.
    let mut head = [0u8; 64];
    let n = {
        use std::io::Read;
        let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
        let mut n = 0;
        while n < head.len() {
            match f.read(&mut head[n..]).map_err(|e| Error::io(path, e))? {
                0 => break,
                k => n += k,
            }
        }
        n
    };
    let format = image::guess_format(&head[..n]).map_err(|_| {
        bad(path, "is not an image: its first bytes match no format tapmap reads (PNG, JPEG, TIFF, BMP, PNM)")
    })?;
    let mut reader = ImageReader::open(path).map_err(|e| Error::io(path, e))?;
    reader.set_format(format);
    let mut limits = Limits::default();
    limits.max_image_width = Some(MAX_SIDE);
    limits.max_image_height = Some(MAX_SIDE);
    limits.max_alloc = Some(MAX_ALLOC);
    reader.limits(limits);
    let img = reader
        .decode()
        .map_err(|e| bad(path, format!("cannot decode: {e}")))?;
    if img.width() == 0 || img.height() == 0 {
        return Err(bad(path, "has zero width or height"));
    }
    to_luma(&img).map_err(|m| bad(path, m))
}

/// Converts a decoded image to a luma plane (see the module header for the rule).
pub fn to_luma(img: &DynamicImage) -> Result<LoadedImage, String> {
    let (w, h) = (img.width() as usize, img.height() as usize);
    let color = img.color();
    let channels = color.channel_count() as usize;
    let bit_depth = (color.bits_per_pixel() / color.channel_count() as u16) as u8;
    let name = match (channels, color.has_alpha()) {
        (1, _) => "grey",
        (2, _) => "grey+alpha",
        (3, _) => "rgb",
        _ => "rgba",
    };
    let plane: Vec<f32> = if let Some(s) = img.as_flat_samples_u8() {
        luma(s.samples, channels, |v| v as f32 / 255.0)
    } else if let Some(s) = img.as_flat_samples_u16() {
        luma(s.samples, channels, |v| v as f32 / 65535.0)
    } else if let Some(s) = img.as_flat_samples_f32() {
        luma(s.samples, channels, |v| v)
    } else {
        return Err(format!(
            "has a sample layout tapmap does not handle ({color:?})"
        ));
    };
    if plane.len() != w * h {
        return Err(format!("decoded {} samples for {w}×{h}", plane.len()));
    }
    let data = Array3::from_shape_vec((1, h, w), plane).map_err(|e| e.to_string())?;
    Ok(LoadedImage {
        data,
        bit_depth,
        color: name,
    })
}

fn luma<T: Copy>(samples: &[T], channels: usize, unit: impl Fn(T) -> f32) -> Vec<f32> {
    match channels {
        1 | 2 => samples.chunks_exact(channels).map(|p| unit(p[0])).collect(),
        _ => samples
            .chunks_exact(channels)
            .map(|p| BT709[0] * unit(p[0]) + BT709[1] * unit(p[1]) + BT709[2] * unit(p[2]))
            .collect(),
    }
}
