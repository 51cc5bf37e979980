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
