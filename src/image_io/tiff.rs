//! One-channel 32-bit float TIFF: maps written with the `tiff` crate (the image
//! crate writes float TIFF only for RGB(A)), and grey float TIFF read with it
//! (the image crate has no grey float layout).

use std::io::Cursor;
use std::path::Path;

use tiff::encoder::{colortype::Gray32Float, TiffEncoder};

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::image_io::convert::{grey_float_image, orientation_of};
use crate::image_io::loaded::{ImageMeta, LoadedImage, ReadOptions};
use crate::image_io::messages::plain_decode_error;

/// Writes an `h × w` plane of f32 as a grey 32-bit float TIFF, atomically.
pub fn write_f32_tiff(path: &Path, plane: &[f32], w: usize, h: usize) -> Result<(), Error> {
    if plane.len() != w * h {
        return Err(Error::shape(format!(
            "a {w}×{h} TIFF needs {} samples, given {}",
            w * h,
            plane.len()
        )));
    }
    // TIFF writing needs Seek; encode in memory, then write the bytes whole.
    let mut buf = Cursor::new(Vec::new());
    TiffEncoder::new(&mut buf)
        .and_then(|mut enc| enc.write_image::<Gray32Float>(w as u32, h as u32, plane))
        .map_err(|e| Error::io(path, std::io::Error::other(e.to_string())))?;
    let bytes = buf.into_inner();
    write_atomic(path, |out| out.write_all(&bytes))
}

/// A one-channel float TIFF (32- or 64-bit samples) from the file's bytes,
/// oriented by its own Orientation tag.
pub(crate) fn decode_grey_float_tiff(
    bytes: &[u8],
    path: &Path,
    opts: &ReadOptions,
) -> Result<LoadedImage, Error> {
    use tiff::decoder::{Decoder, DecodingResult, Limits};
    use tiff::tags::Tag;
    let bad = |m: String| Error::decode(path, m);
    let mut d = Decoder::new(Cursor::new(bytes))
        .map_err(|e| bad(plain_decode_error(&e.to_string(), false)))?;
    let (w, h) = d
        .dimensions()
        .map_err(|e| bad(plain_decode_error(&e.to_string(), false)))?;
    if w == 0 || h == 0 {
        return Err(bad("has zero width or height".into()));
    }
    opts.limits.check_pixels(w as u64, h as u64)?;
    // The file, samples as f64 at worst, and the oriented f32 plane.
    let px = w as u64 * h as u64;
    opts.limits.check_memory(
        (bytes.len() as u64).saturating_add(px.saturating_mul(16)),
        "to decode",
    )?;
    let mut limits = Limits::default();
    limits.decoding_buffer_size = (w as usize).saturating_mul(h as usize).saturating_mul(8);
    let mut d = d.with_limits(limits);
    let tag = d
        .find_tag(Tag::Orientation)
        .ok()
        .flatten()
        .and_then(|v| v.into_u16().ok());
    let (samples, bits) = match d
        .read_image()
        .map_err(|e| bad(plain_decode_error(&e.to_string(), false)))?
    {
        DecodingResult::F32(v) => (v, 32),
        DecodingResult::F64(v) => (v.into_iter().map(|x| x as f32).collect(), 64),
        other => {
            let layout = match other {
                DecodingResult::U8(_) => "8-bit unsigned integer",
                DecodingResult::U16(_) => "16-bit unsigned integer",
                DecodingResult::U32(_) => "32-bit unsigned integer",
                DecodingResult::U64(_) => "64-bit unsigned integer",
                DecodingResult::F16(_) => "16-bit float",
                DecodingResult::I8(_) => "8-bit signed integer",
                DecodingResult::I16(_) => "16-bit signed integer",
                DecodingResult::I32(_) => "32-bit signed integer",
                DecodingResult::I64(_) => "64-bit signed integer",
                DecodingResult::F32(_) | DecodingResult::F64(_) => "float",
            };
            return Err(bad(format!(
                "is a TIFF of {layout} samples in a layout tapmap does not read; tapmap reads \
                 8- and 16-bit unsigned integer TIFF (grey or RGB) and one-channel 32- and \
                 64-bit float TIFF: convert it to one of these"
            )));
        }
    };
    if samples.len() != w as usize * h as usize {
        return Err(bad(format!(
            "has {} samples for {w}×{h}; only one-channel float TIFF is read this way",
            samples.len()
        )));
    }
    let orientation = orientation_of(tag, opts, path, "TIFF")?;
    let info = ImageMeta {
        width: w,
        height: h,
        orientation: tag,
        bit_depth: bits,
        ..ImageMeta::default()
    };
    grey_float_image(w, h, samples, orientation, opts, info).map_err(bad)
}
