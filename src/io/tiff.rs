//! One-channel 32-bit float TIFF output. The image crate writes float TIFF only
//! for RGB(A), so this uses the `tiff` crate directly.

use std::io::Cursor;
use std::path::Path;

use tiff::encoder::{colortype::Gray32Float, TiffEncoder};

use crate::error::Error;
use crate::io::atomic::write_atomic;

/// Writes an `h × w` plane of f32 as a grey 32-bit float TIFF, atomically.
pub fn write_f32_tiff(path: &Path, plane: &[f32], w: usize, h: usize) -> Result<(), Error> {
    // TIFF writing needs Seek; encode in memory, then write the bytes whole.
    let mut buf = Cursor::new(Vec::new());
    TiffEncoder::new(&mut buf)
        .and_then(|mut enc| enc.write_image::<Gray32Float>(w as u32, h as u32, plane))
        .map_err(|e| Error::io(path, std::io::Error::other(e.to_string())))?;
    let bytes = buf.into_inner();
    write_atomic(path, |out| out.write_all(&bytes))
}

/// A one-channel float TIFF read with the `tiff` crate (the image crate has no
/// grey float layout): `(width, height, samples, orientation tag)`.
pub fn read_grey_float_tiff(
    path: &Path,
    check: &dyn Fn(u32, u32) -> Result<(), String>,
) -> Result<(u32, u32, Vec<f32>, Option<u16>), String> {
    use tiff::decoder::{Decoder, DecodingResult, Limits};
    use tiff::tags::Tag;
    let f = std::fs::File::open(path).map_err(|e| e.to_string())?;
    let mut d = Decoder::new(std::io::BufReader::new(f))
        .map_err(|e| crate::io::read::plain_decode_error(&e.to_string(), false))?;
    let (w, h) = d
        .dimensions()
        .map_err(|e| crate::io::read::plain_decode_error(&e.to_string(), false))?;
    if w == 0 || h == 0 {
        return Err("has zero width or height".into());
    }
    check(w, h)?;
    let mut limits = Limits::default();
    limits.decoding_buffer_size = (w as usize).saturating_mul(h as usize).saturating_mul(8);
    let mut d = d.with_limits(limits);
    let orientation = d
        .find_tag(Tag::Orientation)
        .ok()
        .flatten()
        .and_then(|v| v.into_u16().ok());
    let samples = match d
        .read_image()
        .map_err(|e| crate::io::read::plain_decode_error(&e.to_string(), false))?
    {
        DecodingResult::F32(v) => v,
        DecodingResult::F64(v) => v.into_iter().map(|x| x as f32).collect(),
        _ => return Err("is a TIFF layout tapmap does not read".into()),
    };
    if samples.len() != w as usize * h as usize {
        return Err(format!(
            "has {} samples for {w}×{h}; only one-channel float TIFF is read this way",
            samples.len()
        ));
    }
    Ok((w, h, samples, orientation))
}
