//! Stages and recipes: what is computed, in order (conv, act, pool).

pub mod act;
pub mod pool;
pub mod recipe;
pub mod recipefile;

pub use act::Activation;
pub use pool::{Pool, PoolKind, PoolWindow};
pub use recipe::{Recipe, RecipeSpec, Stage};
