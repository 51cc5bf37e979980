//! `tapmap reckon`: each stage's sizes, padding, receptive field and cost for an
//! input size, without reading any image.

use clap::Args;

use tapmap::error::Error;
use tapmap::pipeline::Plan;

use super::args::{parse_size, CombineArgs, StageArgs};
use super::EXIT_OK;

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap reckon --size 640x480 --bank edges\n  \
    tapmap reckon --size 1024x1024 --bank blobs --extent valid --stride 2 --pool max --pool-size 2\n  \
    tapmap reckon --size 4096x3000 --recipe kernels/line-a-edges.recipe.toml";

#[derive(Args)]
pub struct ReckonArgs {
    #[command(flatten)]
    stage: StageArgs,
    #[command(flatten)]
    combine: CombineArgs,
    /// Input size, WIDTHxHEIGHT.
    #[arg(long, value_parser = parse_size, value_name = "WxH")]
    size: (usize, usize),
    /// Print JSON (schema shared/schemas/reckon.schema.json) instead of the table.
    #[arg(long)]
    json: bool,
}

pub fn run(p: ReckonArgs) -> Result<i32, Error> {
    let mut spec = p.stage.spec()?;
    p.combine.apply_to(&mut spec)?;
    let (w, h) = p.size;
    let channels = spec.input.color.bank_channels();
    let plan = Plan::new(&spec.recipe, (channels, h, w), p.stage.engine)?;
    // Each conv stage's pad mode and why it has it.
    let pads: Vec<(usize, String, String)> = spec
        .recipe
        .stages
        .iter()
        .enumerate()
        .filter_map(|(i, st)| match st {
            tapmap::stage::Stage::Conv(c) => Some((i + 1, c.options.pad.name().to_string())),
            _ => None,
        })
        .enumerate()
        .map(|(k, (stage, mode))| {
            let why = spec
                .pads
                .get(k)
                .map_or_else(String::new, ToString::to_string);
            (stage, mode, why)
        })
        .collect();
    if p.json {
        let mut v = tapmap::pipeline::sizes_json((channels, h, w), plan.sizes());
        v["pads"] = serde_json::json!(pads
            .iter()
            .map(|(stage, mode, why)| serde_json::json!({"stage": stage, "mode": mode, "why": why}))
            .collect::<Vec<_>>());
        say!("{v:#}\n");
    } else {
        say!(
            "{}",
            tapmap::pipeline::sizes_table((channels, h, w), plan.sizes())
        );
        for (stage, mode, why) in &pads {
            say!("pad of stage {stage}: {mode} ({why})\n");
        }
    }
    Ok(EXIT_OK)
}
