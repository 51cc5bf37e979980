//! tapmap: apply banks of small convolution kernels to images and write float
//! feature maps.
//!
//! Layers, each in its own module: [`geometry`] (sizes, padding) · [`border`]
//! (pad modes) · [`kernel`] (kernels, banks, built-in families, bank files,
//! analysis) · [`engine`] (strategies for conv stages) · [`stage`] (act, pool,
//! recipes) · [`io`] (image input, map output) · [`stats`] · [`render`] (views,
//! sheets) · [`batch`] (the apply job) ·
//! [`cli`] (the thin command line).
#![deny(missing_docs)]

pub mod border;
pub mod digest;
pub mod engine;
pub mod error;
pub mod geometry;
pub mod image_io;
pub mod jobs;
pub mod kernel;
pub mod limits;
pub mod pipeline;
pub mod render;
pub mod stage;
pub mod stats;

pub use error::{Error, Result};
