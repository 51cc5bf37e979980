//! `tapmap merge`: the shards of a job joined into one run's tables.

use std::path::PathBuf;

use clap::Args;

use tapmap::error::Error;
use tapmap::jobs::merge::merge;

use super::{command_line, status};

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap apply --recipe kernels/line-a-edges.recipe.toml --shard 1/2 --out runs/night captures\n  \
    tapmap apply --recipe kernels/line-a-edges.recipe.toml --shard 2/2 --out runs/night captures\n  \
    tapmap merge runs/night\n\n\
    Writes OUT/stats.csv and OUT/images.csv, byte for byte what one run over all inputs\n\
    writes, and OUT/manifest.json listing every shard's run and files. Maps, views and\n\
    sheets stay in the shard folders.";

#[derive(Args)]
pub struct MergeArgs {
    /// The --out folder the shards wrote into (holding shard-K-of-N folders).
    #[arg(value_name = "OUT")]
    out: PathBuf,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    quiet: bool,
}

pub fn run(m: MergeArgs) -> Result<i32, Error> {
    let r = merge(&m.out, command_line())?;
    if !m.quiet || r.failed > 0 {
        tell!(
            "tapmap: merged {} shards: {} processed, {} failed; tables in {}",
            r.shards,
            r.processed,
            r.failed,
            m.out.display()
        );
    }
    Ok(status(r.failed))
}
