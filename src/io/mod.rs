//! Image input and map output.

pub mod atomic;
pub mod npy;
pub mod read;
pub mod tiff;
