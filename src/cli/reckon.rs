//! `tapmap reckon`: each stage's sizes, padding, receptive field and cost for an
//! input size, without reading any image.

use clap::Args;

use tapmap::error::Error;
use tapmap::pipeline::Plan;

use super::args::{parse_size, StageArgs};
use super::EXIT_OK;

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap reckon --size 640x480 --bank edges\n  \
    tapmap reckon --size 1024x1024 --bank blobs --extent valid --stride 2 --pool max --pool-size 2\n  \
    tapmap reckon --size 4096x3000 --recipe kernels/line-a-edges.recipe.toml";

#[derive(Args)]
pub struct ReckonArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Input size, WIDTHxHEIGHT.
    #[arg(long, value_parser = parse_size, value_name = "WxH")]
    size: (usize, usize),
    /// Print JSON (schema shared/schemas/reckon.schema.json) instead of the table.
    #[arg(long)]
    json: bool,
}

pub fn run(p: ReckonArgs) -> Result<i32, Error> {
    let spec = p.stage.spec()?;
    let (w, h) = p.size;
    let channels = spec.input.color.bank_channels();
    let plan = Plan::new(&spec.recipe, (channels, h, w), p.stage.engine)?;
    if p.json {
        say!(
            "{:#}\n",
            tapmap::pipeline::sizes_json((channels, h, w), plan.sizes())
        );
    } else {
        say!(
            "{}",
            tapmap::pipeline::sizes_table((channels, h, w), plan.sizes())
        );
    }
    Ok(EXIT_OK)
}
