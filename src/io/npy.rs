//! Writing maps as NumPy `.npy` files (float32, C × H × W, C order), whole or not
//! at all: the file is written under a temporary name in its final folder and
//! renamed into place.

use std::path::Path;

use ndarray::Array3;
use ndarray_npy::WriteNpyExt;

use crate::error::Error;
use crate::io::atomic::write_atomic;

/// Writes a `C × H × W` f32 array as `.npy`.
pub fn write_npy(path: &Path, maps: &Array3<f32>) -> Result<(), Error> {
    write_atomic(path, |w| {
        maps.write_npy(w)
            .map_err(|e| std::io::Error::other(e.to_string()))
    })
}
