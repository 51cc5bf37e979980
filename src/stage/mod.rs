//! Stages and recipes: what is computed, in order (conv, act, pool, combine, thin).

pub mod act;
pub mod combine;
pub mod maps;
pub mod pads;
pub mod pool;
pub mod recipe;
pub mod recipefile;

pub use act::Activation;
pub use combine::{Combine, CombineItem, CombineKind, CombineWhat, MapInfo, MapRef, Thin};
pub use pads::{default_pad, PadReason, DEFAULT_PAD};
pub use pool::{Pool, PoolKind, PoolWindow};
pub use recipe::{Recipe, RecipeSpec, Stage};
