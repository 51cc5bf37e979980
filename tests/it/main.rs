//! tapmap's integration tests, in one binary (one link of the crate instead of
//! one per file). Each module is one area; `common` holds the independent
//! oracle and shared helpers.

mod common;

mod api;
mod bad_inputs;
mod bank_learn;
mod batch;
mod borders;
mod cli;
mod combine;
mod engine_oracle;
mod follow;
mod fusion;
mod identities;
mod kernels;
mod learned;
mod published;
mod readme;
mod regression;
mod render;
mod resume;
mod safety;
mod sample_data;
mod schema;
mod shards;
