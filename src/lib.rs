//! tapmap: apply banks of small convolution kernels to images and write float
//! feature maps, views, statistics and a manifest.
//!
//! Layers, each in its own module, lower ones first: [`error`], [`limits`],
//! [`digest`], [`geometry`] (sizes, padding, receptive fields), [`border`] (pad
//! modes), [`stats`], [`regions`] (components above a threshold, Otsu) · [`kernel`] (kernels, banks, built-in families, bank
//! files, imported weights, analysis) · [`engine`] (what a conv stage computes
//! and the planner; the strategies are private) · [`stage`] (act, pool,
//! combine, thin, recipes) · [`pipeline`] (a plan per recipe and input shape) · [`image_io`]
//! (image input, map output) · [`render`] (views, sheets) · [`jobs`] (apply,
//! borders, probe, shard, merge). The command line is the `tapmap` binary,
//! built on this library.
//!
//! Running a recipe over an array:
//!
//! ```
//! use ndarray::Array3;
//! use tapmap::engine::Engine;
//! use tapmap::kernel::builtin::resolve_bank;
//! use tapmap::pipeline::Plan;
//! use tapmap::stage::Recipe;
//!
//! let recipe = Recipe::single(resolve_bank("sobel-x+sobel-y")?, None, None);
//! let plan = Plan::new(&recipe, (1, 48, 64), Engine::Auto)?;
//! let maps = plan.run(Array3::<f32>::zeros((1, 48, 64)).view())?;
//! assert_eq!(maps.dim(), (2, 48, 64));
//! # Ok::<(), tapmap::Error>(())
//! ```
#![deny(missing_docs)]

pub mod border;
pub mod digest;
pub mod engine;
pub mod error;
pub mod geometry;
pub mod image_io;
pub mod jobs;
pub mod kernel;
pub mod learn;
pub mod limits;
pub mod pipeline;
pub mod regions;
pub mod render;
pub mod stage;
pub mod stats;

pub use error::{Error, Result};
