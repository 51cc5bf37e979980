//! Image input and map output: decoding inputs (PNG, JPEG, TIFF, BMP, PNM and
//! NumPy arrays) into `C × H × W` f32 channels with their metadata, and writing
//! maps as `.npy` and float TIFF, every file whole or not at all.

pub mod atomic;
mod bulk;
pub mod convert;
mod exif;
mod jpeg;
pub mod loaded;
pub mod messages;
pub mod npy;
pub mod read;
pub mod tiff;

pub use convert::BT709;
pub use loaded::{ColorMode, ImageMeta, LoadedImage, ReadOptions};
pub use messages::explain_open_error;
pub use npy::write_npy;
pub use read::{decode_image, read_image, read_input};
pub use tiff::write_f32_tiff;
