//! NumPy `.npy` files: arrays read as images, and maps written (float32,
//! C × H × W, C order) whole or not at all, under a temporary name in their
//! final folder and renamed into place.

use std::path::Path;

use ndarray::{Array3, ArrayView3};
use ndarray_npy::WriteNpyExt;

use crate::error::Error;
use crate::image_io::atomic::{write_atomic, write_atomic_file};
use crate::image_io::convert::from_planes;
use crate::image_io::loaded::{white_level, ImageMeta, LoadedImage, ReadOptions};

/// Writes a `C × H × W` f32 array as `.npy`: the header, then the samples as
/// they lie in memory, past the page cache where the file system allows it
/// (see `bulk`). Arrays not in C order (never produced by the engine) go
/// through `ndarray-npy`.
pub fn write_npy(path: &Path, maps: ArrayView3<f32>) -> Result<(), Error> {
    match maps.as_slice() {
        Some(samples) if cfg!(target_endian = "little") => {
            let header = npy_header_f32(maps.dim());
            // SAFETY: any f32 is 4 initialised bytes; the byte view borrows
            // `samples` and has exactly its length in bytes.
            let bytes = unsafe {
                std::slice::from_raw_parts(
                    samples.as_ptr().cast::<u8>(),
                    std::mem::size_of_val(samples),
                )
            };
            write_atomic_file(path, |f| {
                crate::image_io::bulk::write_parts(f, &[&header, bytes]).map(|_| ())
            })
        }
        _ => write_atomic(path, |w| {
            maps.write_npy(w)
                .map_err(|e| std::io::Error::other(e.to_string()))
        }),
    }
}

/// The `.npy` version 1.0 header of a C × H × W little-endian f32 array in C order
/// (NumPy's "NEP 1: A simple file format for NumPy arrays" and the
/// `numpy.lib.format` documentation): magic, version, header length, then the
/// dictionary padded with spaces and a newline to a multiple of 64 bytes.
fn npy_header_f32((c, h, w): (usize, usize, usize)) -> Vec<u8> {
    let dict = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({c}, {h}, {w})}}");
    let unpadded = 10 + dict.len() + 1;
    let total = unpadded.div_ceil(64) * 64;
    let len = (total - 10) as u16;
    let mut h = Vec::with_capacity(total);
    h.extend_from_slice(b"\x93NUMPY\x01\x00");
    h.extend_from_slice(&len.to_le_bytes());
    h.extend_from_slice(dict.as_bytes());
    h.resize(total - 1, b' ');
    h.push(b'\n');
    h
}

/// A NumPy `.npy` array as an image: H×W or C×H×W, uint8, uint16, float32 or
/// float64 (either byte order, C or Fortran order). Integers are divided by the
/// white level as for image files; floats are taken as they are (float64 is
/// rounded to float32, the precision every map is computed in; images.csv
/// records the stored depth, 64). One channel is grey, three are r, g, b;
/// other counts are channels c0, c1, … (split mode only). Arrays carry no
/// orientation.
pub(crate) fn decode_npy_image(
    bytes: &[u8],
    path: &Path,
    opts: &ReadOptions,
) -> Result<LoadedImage, Error> {
    let bad = |m: String| Error::decode(path, m);
    let crate::kernel::tensors::NpyArray {
        shape,
        mut data,
        full_scale: full,
        bits,
    } = crate::kernel::tensors::npy_array(bytes).map_err(bad)?;
    let (c, h, w) = match shape.as_slice() {
        [h, w] => (1, *h, *w),
        [c, h, w] => (*c, *h, *w),
        s => {
            return Err(bad(format!(
                "is an array of shape {s:?}; images are H×W or C×H×W"
            )))
        }
    };
    if c == 0 || h == 0 || w == 0 {
        return Err(bad(format!("has a zero-sized dimension {shape:?}")));
    }
    opts.limits.check_pixels(w as u64, h as u64)?;
    opts.limits.check_memory(
        (bytes.len() as u64).saturating_add((data.len() as u64).saturating_mul(8)),
        "to read",
    )?;
    let mut info = ImageMeta {
        width: w as u32,
        height: h as u32,
        bit_depth: bits,
        ..ImageMeta::default()
    };
    match full {
        Some(f) => {
            let wl = white_level(opts, f);
            info.white = Some(wl);
            data.iter_mut().for_each(|v| *v /= wl as f32);
        }
        None => info.float = true,
    }
    info.color = match c {
        1 => "grey",
        3 => "rgb",
        _ => "array",
    }
    .to_string();
    let planes = Array3::from_shape_vec((c, h, w), data).map_err(|e| bad(e.to_string()))?;
    from_planes(planes, opts, info).map_err(bad)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// What `ndarray-npy` writes for `a`: the reference.
    fn reference(a: ArrayView3<f32>) -> Vec<u8> {
        let mut v = Vec::new();
        a.write_npy(&mut v).unwrap();
        v
    }

    #[test]
    fn the_header_is_the_one_ndarray_npy_writes() {
        // ndarray-npy follows NEP 1 (version 1.0 header padded to 64 bytes).
        for shape in [(5, 1944, 2592), (1, 1, 1), (3, 7, 11), (64, 100_000, 3)] {
            let h = npy_header_f32(shape);
            assert_eq!(h.len() % 64, 0, "{shape:?}");
            assert_eq!(&h[..8], b"\x93NUMPY\x01\x00");
            assert_eq!(u16::from_le_bytes([h[8], h[9]]) as usize, h.len() - 10);
            assert_eq!(*h.last().unwrap(), b'\n');
        }
        for shape in [(1, 1, 1), (3, 7, 11), (2, 40, 31)] {
            let a = Array3::<f32>::zeros(shape);
            let r = reference(a.view());
            let h = npy_header_f32(a.dim());
            assert_eq!(&r[..h.len()], &h[..], "{shape:?}");
        }
    }

    #[test]
    fn a_large_map_file_is_byte_for_byte_what_ndarray_npy_writes() {
        // 3 x 1031 x 1117 floats: 13.8 MB, more than two direct chunks, and a
        // length that is no multiple of the block size.
        let a = Array3::from_shape_fn((3, 1031, 1117), |(c, y, x)| {
            (c as f32 - 1.0) * 0.25 + (y as f32 * 0.013).sin() * (x as f32 * 0.007).cos()
        });
        let d = tempfile::tempdir_in(env!("CARGO_MANIFEST_DIR")).unwrap();
        let small = a.slice(ndarray::s![..1, ..5, ..9]).to_owned();
        for (name, v) in [("big.npy", a.view()), ("small.npy", small.view())] {
            let p = d.path().join(name);
            write_npy(&p, v).unwrap();
            let back = std::fs::read(&p).unwrap();
            assert!(back == reference(v), "{name} differs");
        }
        // Not in C order (a transposed view): written through ndarray-npy.
        let t = a.view().permuted_axes([0, 2, 1]);
        let p = d.path().join("t.npy");
        write_npy(&p, t).unwrap();
        assert!(std::fs::read(&p).unwrap() == reference(t));
    }
}
