//! `tapmap borders`: flags → [`BordersJob`]; each image's table on stdout.

use clap::Args;

use tapmap::border::PadMode;
use tapmap::error::Error;
use tapmap::jobs::borders::{run_borders, BordersJob};
use tapmap::jobs::Stop;

use super::args::{parse_tolerance, thread_count, RunArgs, StageArgs};
use super::{status, watch_stop_signals, Terminal};

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap borders --bank edges --out runs/borders sample_data/line-a\n  \
    tapmap borders --bank gaussian:sigma=2 --crop 24 --out runs/borders-crop sample_data/line-a/s1-glaze\n  \
    tapmap borders --recipe kernels/pinhole-blobs.recipe.toml --modes zero,reflect,symmetric --out runs/b img.png\n\n\
    Writes OUT/borders.csv (error by distance from the edge), OUT/bands.csv (measured and\n  \
    predicted band per edge), OUT/summary.csv, OUT/views/P/NN-channel/MODE.png (|mode − median|,\n  \
    measured band outlined in amber, predicted in cyan), OUT/plots/P.png and OUT/plot.png.";

#[derive(Args)]
pub struct BordersArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Pad modes to compare, comma-separated.
    #[arg(long, default_value = "zero,replicate,reflect,symmetric,wrap", value_parser = parse_modes, value_name = "LIST")]
    modes: ModeList,
    /// Two results agree when they differ by at most T (response units).
    #[arg(long, default_value_t = 1e-6, value_name = "T", value_parser = parse_tolerance)]
    tolerance: f32,
    /// Also compare each mode with the real surroundings: cut a window N pixels in
    /// from every side, run it with each mode, compare with the full image's result.
    #[arg(long, value_name = "N")]
    crop: Option<usize>,
    /// Threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    jobs: Option<u32>,
    #[command(flatten)]
    io: RunArgs,
}

/// A comma-separated list of distinct pad modes.
#[derive(Clone, Debug)]
struct ModeList(Vec<PadMode>);

fn parse_modes(s: &str) -> Result<ModeList, String> {
    let mut v: Vec<PadMode> = Vec::new();
    for p in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let m: PadMode = p.parse()?;
        if v.contains(&m) {
            return Err(format!("mode '{p}' given twice"));
        }
        v.push(m);
    }
    if v.len() < 2 {
        return Err("give at least two pad modes to compare".into());
    }
    Ok(ModeList(v))
}

pub fn run(b: BordersArgs) -> Result<i32, Error> {
    let stop = Stop::new();
    let job = BordersJob {
        command_line: super::command_line(),
        spec: b.stage.spec()?,
        engine: b.stage.engine,
        modes: b.modes.0,
        tolerance: b.tolerance,
        crop: b.crop,
        out_dir: b.io.out.clone(),
        inputs: b.io.inputs,
        jobs: thread_count(b.jobs),
        stop: stop.clone(),
    };
    watch_stop_signals(&stop)?;
    let s = run_borders(&job, &Terminal::new(b.io.quiet, "images"))?;
    if !b.io.quiet || s.failed > 0 {
        tell!(
            "tapmap: {} image(s) studied, {} failed; results in {}",
            s.studied,
            s.failed,
            b.io.out.display()
        );
    }
    if let Some(sig) = stop.requested() {
        return Ok(128 + sig);
    }
    Ok(status(s.failed))
}
