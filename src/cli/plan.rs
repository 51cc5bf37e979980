//! `tapmap plan`: each stage's sizes, padding, receptive field and cost for an
//! input size, without reading any image.

use clap::Args;

use tapmap::error::Error;
use tapmap::pipeline::Plan;

use super::args::{parse_size, StageArgs};
use super::EXIT_OK;

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap plan --size 640x480 --bank edges\n  \
    tapmap plan --size 1024x1024 --bank blobs --extent valid --stride 2 --pool max --pool-size 2\n  \
    tapmap plan --size 4096x3000 --recipe kernels/line-a-edges.recipe.toml";

#[derive(Args)]
pub struct PlanArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Input size, WIDTHxHEIGHT.
    #[arg(long, value_parser = parse_size, value_name = "WxH")]
    size: (usize, usize),
}

pub fn run(p: PlanArgs) -> Result<i32, Error> {
    let spec = p.stage.spec()?;
    let (w, h) = p.size;
    let channels = spec.input.color.bank_channels();
    let plan = Plan::new(&spec.recipe, (channels, h, w), p.stage.engine)?;
    say!(
        "{}",
        tapmap::pipeline::sizes_table((channels, h, w), plan.sizes())
    );
    Ok(EXIT_OK)
}
