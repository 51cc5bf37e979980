//! `tapmap probe`: flags → [`ProbeJob`] → a summary line and exit status.

use clap::Args;

use tapmap::error::Error;
use tapmap::jobs::probe::{run_probe, ProbeJob};
use tapmap::jobs::Stop;

use super::args::{thread_count, RunArgs, StageArgs};
use super::{status, watch_stop_signals, Terminal};

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap probe --bank sample_data/learned/first-layer.npy --act relu --top 8 --out runs/probe sample_data\n  \
    tapmap probe --recipe kernels/pinhole-blobs.recipe.toml --top 5 --out runs/pinholes sample_data/line-a\n\n\
    Writes OUT/probe.csv, OUT/kernels/NN-name.png (one sheet per kernel) and OUT/overview.png.\n\
    Hits of one kernel in one image never have overlapping receptive fields (they are at least\n\
    ceil(R/J) output pixels apart in x or y; R receptive field, J stride product).";

#[derive(Args)]
pub struct ProbeArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Hits kept per kernel.
    #[arg(long, default_value_t = 9, value_name = "K", value_parser = clap::value_parser!(u32).range(1..))]
    top: u32,
    /// Images processed at once, and threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    jobs: Option<u32>,
    #[command(flatten)]
    io: RunArgs,
}

pub fn run(p: ProbeArgs) -> Result<i32, Error> {
    let stop = Stop::new();
    let job = ProbeJob {
        command_line: super::command_line(),
        spec: p.stage.spec()?,
        engine: p.stage.engine,
        top: p.top as usize,
        out_dir: p.io.out.clone(),
        inputs: p.io.inputs,
        jobs: thread_count(p.jobs),
        stop: stop.clone(),
    };
    watch_stop_signals(&stop)?;
    let s = run_probe(&job, &Terminal::new(p.io.quiet, "images"))?;
    if !p.io.quiet || s.failed > 0 {
        tell!(
            "tapmap: probed {} image(s), {} failed; {} kernel(s), top {}; results in {}",
            s.probed,
            s.failed,
            s.kernels,
            job.top,
            p.io.out.display()
        );
    }
    if let Some(sig) = stop.requested() {
        return Ok(128 + sig);
    }
    Ok(status(s.failed))
}
