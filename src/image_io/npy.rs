//! NumPy `.npy` files: arrays read as images, and maps written (float32,
//! C × H × W, C order) whole or not at all, under a temporary name in their
//! final folder and renamed into place.

use std::path::Path;

use ndarray::{Array3, ArrayView3};
use ndarray_npy::WriteNpyExt;

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::image_io::convert::from_planes;
use crate::image_io::loaded::{white_level, ImageMeta, LoadedImage, ReadOptions};

/// Writes a `C × H × W` f32 array as `.npy`.
pub fn write_npy(path: &Path, maps: ArrayView3<f32>) -> Result<(), Error> {
    write_atomic(path, |w| {
        maps.write_npy(w)
            .map_err(|e| std::io::Error::other(e.to_string()))
    })
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
