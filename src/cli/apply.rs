//! `tapmap apply`: flags → [`ApplyJob`] → the summary line and exit status.

use clap::Args;

use tapmap::error::Error;
use tapmap::jobs::follow::{run_follow, FollowOptions};
use tapmap::jobs::shard::{resolve, ShardSpec};
use tapmap::jobs::{run_apply, ApplyJob, Save, Stop, ViewOptions};

use super::args::{
    parse_depth, parse_duration, parse_range, thread_count, CombineArgs, RunArgs, StageArgs,
};
use super::{command_line, status, watch_stop_signals, Terminal, EXIT_SOME_FAILED};

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap apply --recipe kernels/line-a-edges.recipe.toml --out runs/night sample_data\n  \
    tapmap apply --bank edges --white 4095 --save all --out runs/s1 'captures/s1/**/*.png'\n  \
    tapmap apply --bank gaussian:sigma=2 --pad reflect --stride 2 --out blur tile.tif\n  \
    tapmap apply --bank my-filters.toml --color rgb --act relu --pool max --pool-size 2 --out fm photos/\n  \
    tapmap apply --bank sobel-x+sobel-y --white 4095 --combine gradient --drop-sources --threshold otsu --out edges captures/\n  \
    tapmap apply --recipe kernels/line-a-edges.recipe.toml --follow --status-log runs/shift/status.jsonl --out runs/shift incoming/\n\n\
    Outputs mirror each input's path below its folder or pattern root:\n  \
    OUT/maps/P.npy (float32 C×H×W, numpy.load), OUT/views/P/NN-name.png, OUT/sheets/P.png,\n  \
    OUT/tiff/P/NN-name.tif, OUT/keys/P/NN-name.png, OUT/stats.csv, OUT/images.csv, OUT/manifest.json.";

#[derive(Args)]
pub struct ApplyArgs {
    #[command(flatten)]
    stage: StageArgs,
    #[command(flatten)]
    combine: CombineArgs,
    #[command(flatten)]
    io: RunArgs,
    /// What to write, comma-separated: maps, tiff, views, sheets, stats, manifest, keys
    /// (each view with its name and colour key, for people), or all.
    /// images.csv is always written.
    #[arg(long, default_value = "maps,views,stats,manifest", value_name = "LIST")]
    save: Save,
    /// Fixed value range LO,HI for every view [default: per map].
    #[arg(long, value_parser = parse_range, value_name = "LO,HI", allow_hyphen_values = true)]
    view_range: Option<(f32, f32)>,
    /// Bits per grey view sample: 8 or 16.
    #[arg(long, default_value_t = 8, value_parser = parse_depth, value_name = "BITS")]
    view_depth: u8,
    /// View PNG compression: fast (the default; measured fastest for a few per cent
    /// larger files) or small (zlib level 6 with adaptive filters, tens of times slower).
    #[arg(long, default_value = "fast", value_name = "fast|small")]
    view_png: tapmap::render::ViewPng,
    /// Threshold for the edge measures of every map in stats.csv: above_fraction
    /// (samples > T), components of those samples, and the largest one's area,
    /// inclusive bounding box and centroid (drawn on sheets and keys). A number, or
    /// otsu for each map's own Otsu level.
    #[arg(long, value_name = "T|otsu", allow_hyphen_values = true)]
    threshold: Option<tapmap::regions::Threshold>,
    /// Pixels that join into one component: 8 (edges and corners) or 4 (edges only).
    #[arg(long, default_value = "8", value_name = "8|4", requires = "threshold")]
    connectivity: tapmap::regions::Connectivity,
    /// Leave the N outermost rows and columns of every map out of the components
    /// (a tile's or fixture's outline there is not a defect); above_fraction still
    /// counts the whole map.
    #[arg(long, default_value_t = 0, value_name = "N", requires = "threshold")]
    measure_inset: usize,
    /// Images processed at once, and threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    jobs: Option<u32>,
    /// Take up a run where it stopped: inputs whose outputs are in place and whose
    /// journal entry matches (same file contents, recipe, banks, options, version)
    /// are not redone; everything else is.
    #[arg(long)]
    resume: bool,
    /// Run part K of N (1 ≤ K ≤ N) of the sorted inputs, into OUT/shard-K-of-N;
    /// `auto` takes K and N from a Slurm job array, `auto/N` from a Kubernetes
    /// indexed job (JOB_COMPLETION_INDEX) with N completions. Then `tapmap merge OUT`.
    #[arg(long, value_name = "K/N|auto|auto/N")]
    shard: Option<ShardSpec>,
    /// After the inputs that are there, keep watching their folders and patterns
    /// and process each new or changed image once it is complete; stop with
    /// SIGINT/SIGTERM (Ctrl-C). Takes up its own earlier run like --resume.
    #[arg(long, conflicts_with = "shard")]
    follow: bool,
    /// With --follow: look for changes every DURATION instead of listening for
    /// the operating system's file events (network mounts), e.g. 2s.
    #[arg(long, value_name = "DURATION", value_parser = parse_duration, requires = "follow")]
    poll: Option<std::time::Duration>,
    /// With --follow: a file is complete once its size and modification time stay
    /// the same this long (a file closed after writing, or renamed into place, is
    /// taken at once).
    #[arg(long, value_name = "DURATION", value_parser = parse_duration, default_value = "3s", requires = "follow")]
    settle: std::time::Duration,
    /// With --follow: how often the status line is shown and logged.
    #[arg(long, value_name = "DURATION", value_parser = parse_duration, default_value = "2s", requires = "follow")]
    status_every: std::time::Duration,
    /// With --follow: append the status as one JSON line per interval to FILE
    /// (schema shared/schemas/follow-status.schema.json).
    #[arg(long, value_name = "FILE", requires = "follow")]
    status_log: Option<std::path::PathBuf>,
    /// At the end, print the run's summary as JSON on stdout (schema
    /// shared/schemas/summary.schema.json).
    #[arg(long)]
    json: bool,
}

pub fn run(a: ApplyArgs) -> Result<i32, Error> {
    let mut spec = a.stage.spec()?;
    a.combine.apply_to(&mut spec)?;
    let stop = Stop::new();
    let job = ApplyJob {
        spec,
        engine: a.stage.engine,
        out_dir: a.io.out.clone(),
        inputs: a.io.inputs,
        save: a.save,
        view: ViewOptions {
            range: a.view_range,
            depth16: a.view_depth == 16,
            png: a.view_png,
        },
        threshold: a.threshold,
        connectivity: a.connectivity,
        inset: a.measure_inset,
        jobs: thread_count(a.jobs),
        command_line: command_line(),
        shard: a
            .shard
            .map(|s| resolve(s, &|k| std::env::var(k).ok()))
            .transpose()?,
        resume: a.resume,
        stop: stop.clone(),
    };
    if a.view_depth == 16 && !(a.save.views || a.save.sheets) {
        tell!("tapmap: warning: --view-depth 16 changes nothing without views or sheets in --save");
    }
    watch_stop_signals(&stop)?;
    let summary = if a.follow {
        if a.status_every.is_zero() {
            return Err(Error::usage("--status-every must be longer than zero"));
        }
        let opts = FollowOptions {
            poll: a.poll.filter(|d| !d.is_zero()),
            settle: a.settle,
            status_every: a.status_every,
            status_log: a.status_log.clone(),
        };
        run_follow(&job, &opts, &Terminal::following(a.io.quiet))?
    } else {
        run_apply(&job, &Terminal::new(a.io.quiet, "images"))?
    };
    let signal = summary.stopped_by;
    for w in &summary.warnings {
        tell!("tapmap: warning: {w}");
    }
    if !a.io.quiet || summary.failed > 0 || signal.is_some() || summary.tables_error.is_some() {
        let worked = summary.processed + summary.failed - summary.resumed;
        let mut extra = String::new();
        if a.resume {
            extra += &format!(", {} taken from the earlier run", summary.resumed);
        }
        if let Some(f) = &summary.follow {
            extra += &format!(", {} arrived while following", f.arrived);
            if !f.redone.is_empty() {
                extra += &format!(" ({} changed and done again)", f.redone.len());
            }
            if let (Some(p50), Some(p99)) = (f.lag_p50_s, f.lag_p99_s) {
                extra += &format!(", lag p50 {p50:.2} s p99 {p99:.2} s");
            }
            if f.left_waiting > 0 {
                extra += &format!(
                    ", {} still arriving at the stop (taken by the next start)",
                    f.left_waiting
                );
            }
        }
        if let Some(sig) = signal {
            extra += &format!(
                ", stopped by signal {sig} with {} not started (finish with --resume)",
                summary.not_run
            );
        }
        // A rate only for work done here, not for results taken over.
        // Nor while following, where the time is mostly waiting for files.
        let rate = if worked > 0 && summary.seconds > 0.0 && summary.follow.is_none() {
            format!(
                " ({})",
                super::rate_text(worked as f64 / summary.seconds, "images")
            )
        } else {
            String::new()
        };
        tell!(
            "tapmap: {} processed, {} failed{extra}, {:.2} s{rate}; {} files in {} (see images.csv{})",
            summary.processed,
            summary.failed,
            summary.seconds,
            summary.files,
            summary.dir.display(),
            if a.save.manifest { ", manifest.json" } else { "" }
        );
    }
    if a.json {
        let s = &summary;
        let mut json = serde_json::json!({
            "format": "tapmap-summary",
            "summary_version": 1,
            "processed": s.processed,
            "failed": s.failed,
            "resumed": s.resumed,
            "not_run": s.not_run,
            "files": s.files,
            "seconds": s.seconds,
            "folder": tapmap::jobs::inputs::path_text(&s.dir),
            "stopped_by_signal": s.stopped_by,
            "tables_error": s.tables_error,
            "warnings": s.warnings,
        });
        if let Some(f) = &s.follow {
            json["follow"] = serde_json::to_value(f).expect("plain fields");
        }
        say!("{json}\n");
    }
    if let Some(e) = &summary.tables_error {
        tell!(
            "tapmap: error: every image's files are in place, but the tables could not be \
             written: {e}; make room and run the same command again with --resume to write them"
        );
        return Ok(EXIT_SOME_FAILED);
    }
    if let Some(sig) = signal {
        return Ok(128 + sig);
    }
    Ok(status(summary.failed))
}
