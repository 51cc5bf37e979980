//! Reading images into `C × H × W` f32 arrays, with what the file says about itself.
//!
//! An input is read from disk once ([`read_input`]): the same bytes feed the
//! digest, the format check and the decoder ([`decode_image`]).
//!
//! - **Units**: integer samples are divided by the white level: the type's full
//!   scale (255, 65535), or a declared `white` (such as 4095 for 12-bit data stored
//!   in 16 bits) where the type can hold it. Float samples are taken as they are.
//!   16-bit samples go to f32 directly; f32 holds every 16-bit level exactly.
//! - **Orientation**: the EXIF orientation (or a TIFF's own Orientation tag) is
//!   applied before anything else, so maps line up with what a viewer shows
//!   (EXIF 2.3, JEITA CP-3451C, tag 0x0112: values 1–8). It can be switched off.
//! - **Colour**: see [`crate::image_io::convert`].
//! - **Content decides the format**, not the extension.

use std::io::Cursor;
use std::path::Path;

use image::metadata::Orientation;
use image::{DynamicImage, ImageDecoder, ImageReader};

use crate::error::Error;
use crate::image_io::convert::{convert, orientation_of};
use crate::image_io::exif::read_exif;
use crate::image_io::jpeg::jpeg_ends_whole;
use crate::image_io::loaded::{ImageMeta, LoadedImage, ReadOptions};
use crate::image_io::messages::{decode_message, explain_open_error};
use crate::limits::{bytes_text, Limits};

/// Reads an input file's bytes whole, once, for the digest, the format check
/// and the decoder. Refuses folders, empty files and files larger than the
/// memory limit allows, before reading them.
pub fn read_input(path: &Path, limits: &Limits) -> Result<Vec<u8>, Error> {
    let meta = std::fs::metadata(path).map_err(|e| explain_open_error(path, e))?;
    if meta.is_dir() {
        return Err(Error::decode(path, "is a folder, not an image file"));
    }
    if meta.len() == 0 {
        return Err(Error::decode(path, "is empty (0 bytes)"));
    }
    if meta.len() > limits.max_memory {
        return Err(Error::Limit {
            path: Some(path.to_path_buf()),
            message: format!(
                "is {}, too large to read within --max-memory ({})",
                bytes_text(meta.len()),
                bytes_text(limits.max_memory)
            ),
        });
    }
    std::fs::read(path).map_err(|e| explain_open_error(path, e))
}

/// Reads and decodes an image file (see the module header for units,
/// orientation, colour). Images with samples that are not finite (NaN,
/// ±infinity) are refused: no convolution result near them would mean anything.
pub fn read_image(path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let bytes = read_input(path, &opts.limits)?;
    decode_image(&bytes, path, opts)
}

/// Decodes the bytes of an image file read with [`read_input`]; `path` names
/// it in messages. See [`read_image`].
pub fn decode_image(bytes: &[u8], path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let img = decode_any(bytes, path, opts).map_err(|e| e.in_file(path))?;
    let bad_samples = match img.data.as_slice() {
        Some(s) => s.iter().filter(|v| !v.is_finite()).count(),
        None => img.data.iter().filter(|v| !v.is_finite()).count(),
    };
    if bad_samples > 0 {
        return Err(Error::decode(
            path,
            format!(
                "has {bad_samples} sample(s) that are not finite (NaN or infinite); \
                 replace them before filtering"
            ),
        ));
    }
    Ok(img)
}

fn decode_any(bytes: &[u8], path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let bad = |m: String| Error::decode(path, m);
    // Trust the content, not the extension: a text file named .png is "not an
    // image", a PNG named .tif still reads.
    if bytes.starts_with(b"\x93NUMPY") {
        return crate::image_io::npy::decode_npy_image(bytes, path, opts);
    }
    let head = &bytes[..bytes.len().min(64)];
    let format = image::guess_format(head).map_err(|_| {
        bad("is not an image: its first bytes match no format tapmap reads (PNG, JPEG, TIFF, BMP, PNM)".into())
    })?;
    if format == image::ImageFormat::Jpeg {
        jpeg_ends_whole(bytes).map_err(bad)?;
    }
    let mut reader = ImageReader::new(Cursor::new(bytes));
    reader.set_format(format);
    // Sizes are checked here against --max-pixels with a plain message; the
    // decoder's own limit caps what it may allocate.
    let mut limits = image::Limits::default();
    limits.max_image_width = None;
    limits.max_image_height = None;
    limits.max_alloc = Some(opts.limits.max_memory);
    reader.limits(limits);
    let mut decoder = match reader.into_decoder() {
        Ok(d) => d,
        Err(image::ImageError::Unsupported(_)) if format == image::ImageFormat::Tiff => {
            return crate::image_io::tiff::decode_grey_float_tiff(bytes, path, opts);
        }
        Err(image::ImageError::Limits(e)) => {
            return Err(Error::Limit {
                path: Some(path.to_path_buf()),
                message: format!("is too large to decode within --max-memory ({e})"),
            })
        }
        Err(e) => return Err(bad(decode_message(&e))),
    };
    let (w, h) = decoder.dimensions();
    opts.limits.check_pixels(w as u64, h as u64)?;
    let mut info = ImageMeta::default();
    let exif_raw = decoder
        .exif_metadata()
        .map_err(|e| bad(format!("cannot read its metadata: {e}")))?;
    if let Some(raw) = exif_raw.as_deref() {
        // An EXIF block that does not parse leaves the orientation unknown: that
        // fails the image, unless orientation is ignored anyway.
        if let Err(m) = read_exif(raw, &mut info) {
            if opts.apply_orientation {
                return Err(bad(m));
            }
        }
    }
    if info.orientation.is_none() {
        // TIFF keeps orientation in its own tag rather than an EXIF block.
        let o = decoder
            .orientation()
            .map_err(|e| bad(format!("cannot read its orientation: {e}")))?;
        if o != Orientation::NoTransforms {
            info.orientation = Some(o.to_exif() as u16);
        }
    }
    let orientation = orientation_of(info.orientation, opts, path, "EXIF")?;
    // At the busiest: the file's bytes, the decoded samples (twice while a
    // turn by 90° or 270° copies them) and the f32 planes made from them, one
    // per channel the colour mode gives.
    let decoded = decoder.total_bytes();
    let turns = matches!(
        orientation,
        Orientation::Rotate90
            | Orientation::Rotate270
            | Orientation::Rotate90FlipH
            | Orientation::Rotate270FlipH
    );
    let colour = decoder.color_type().channel_count() >= 3;
    let planes = match opts.color {
        crate::image_io::loaded::ColorMode::Luma => 1,
        _ if colour => 3,
        _ => 1,
    };
    let need = (bytes.len() as u64)
        .saturating_add(decoded.saturating_mul(if turns { 2 } else { 1 }))
        .saturating_add((w as u64 * h as u64).saturating_mul(4 * planes));
    opts.limits.check_memory(need, "to decode")?;
    let mut img = DynamicImage::from_decoder(decoder).map_err(|e| bad(decode_message(&e)))?;
    if img.width() == 0 || img.height() == 0 {
        return Err(bad("has zero width or height".into()));
    }
    info.width = img.width();
    info.height = img.height();
    img.apply_orientation(orientation);
    info.orientation_applied = orientation != Orientation::NoTransforms;
    convert(&img, opts, info).map_err(bad)
}
