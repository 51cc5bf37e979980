//! tapmap: apply banks of small convolution kernels to images and write float
//! feature maps.
//!
//! Layers, each in its own module: [`geometry`] (sizes, padding) · [`border`]
//! (pad modes) · [`kernel`] (kernels, banks, built-in families, bank files,
//! analysis) · [`engine`] (strategies for conv stages) · [`stage`] (act, pool,
//! recipes) · [`io`] (image input, map output) · [`apply`] (the batch job) ·
//! [`cli`] (the thin command line).
#![deny(missing_docs)]

pub mod apply;
pub mod border;
pub mod cli;
pub mod engine;
pub mod error;
pub mod geometry;
pub mod io;
pub mod kernel;
pub mod stage;

pub use error::{Error, Result};
