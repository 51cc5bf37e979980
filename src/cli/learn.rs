//! `tapmap bank learn`: flags → [`LearnJob`] → a bank file, its sheet, a
//! summary and an exit status.

use std::path::PathBuf;

use clap::Args;

use tapmap::error::Error;
use tapmap::jobs::learn::{run_learn, LearnJob};
use tapmap::jobs::Stop;
use tapmap::learn::{Detail, LearnSettings, Method, Whiten, CONTRAST_EPS, WHITEN_EPS};

use super::args::{parse_pair, thread_count, InputArgs};
use super::{status, watch_stop_signals, Terminal};

pub const AFTER_HELP: &str = "Examples:\n  \
    tapmap bank learn --method kmeans --size 7 --count 16 -o line-a-k16.toml sample_data/line-a\n  \
    tapmap bank learn --method pca --size 5 --count 8 --patches 50000 -o pca.toml 'captures/**/*.png'\n\n\
    Patches are drawn uniformly over every position where they fit inside an image\n\
    (the same sample for a seed whatever --jobs), normalised (mean 0, divided by\n\
    sqrt(variance + contrast ε)), optionally whitened (ZCA), then learned from. The bank\n\
    applies the same normalisation to every window it reads, so `apply --bank BANK.toml`\n\
    gives the method's features; add --act relu (or abs) for first-layer encodings.\n\
    The bank's taps are drawn to BANK.png beside it.";

#[derive(Args)]
pub struct LearnArgs {
    /// pca (principal components), kmeans (spherical k-means, Coates & Ng 2012) or
    /// lloyd (Euclidean k-means with k-means++ starts).
    #[arg(long, default_value = "kmeans", value_name = "METHOD")]
    method: Method,
    /// Patch size: N, or ROWS,COLS (odd or even).
    #[arg(long, default_value = "7", value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    size: (usize, usize),
    /// Kernels to learn.
    #[arg(long, short = 'k', default_value_t = 16, value_name = "K",
          value_parser = clap::value_parser!(u32).range(1..))]
    count: u32,
    /// Patches to sample (held in memory: patches × channels·rows·cols × 4 bytes).
    #[arg(long, default_value_t = 100_000, value_name = "M",
          value_parser = clap::value_parser!(u64).range(2..=1 << 31))]
    patches: u64,
    /// Seed of the sample and of the k-means starts.
    #[arg(long, default_value_t = 1, value_name = "S",
          value_parser = clap::value_parser!(u64).range(0..=i64::MAX as u64))]
    seed: u64,
    /// zca or none [default: zca for kmeans and lloyd, none for pca].
    #[arg(long, value_name = "HOW")]
    whiten: Option<Whiten>,
    /// ε added to the eigenvalues in ZCA whitening (normalised patches).
    #[arg(long, default_value_t = WHITEN_EPS, value_name = "E", value_parser = parse_positive)]
    whiten_eps: f64,
    /// ε of the patch normalisation, in input units (integers read as 0…1):
    /// the default is 10/255², the chapter's 10 for 0…255 pixels.
    #[arg(long, default_value_t = CONTRAST_EPS, value_name = "E", value_parser = parse_positive)]
    contrast_eps: f64,
    /// Most k-means updates.
    #[arg(long, default_value_t = 50, value_name = "N")]
    iterations: usize,
    /// k-means stops when the objective moves by less than this fraction.
    #[arg(long, default_value_t = 1e-4, value_name = "T", value_parser = parse_fraction)]
    tolerance: f64,
    /// k-means starts from different seeds; the lowest objective is kept.
    #[arg(long, default_value_t = 1, value_name = "N",
          value_parser = clap::value_parser!(u32).range(1..))]
    restarts: u32,
    /// Also write the sample (normalised, not whitened; float32, patches × channels·rows·cols)
    /// to FILE.npy, its mean to FILE-mean.npy and the whitening matrix to FILE-whitening.npy.
    #[arg(long, value_name = "FILE.npy")]
    keep_patches: Option<PathBuf>,
    /// Draw the bank here instead of beside it.
    #[arg(long, value_name = "FILE.png")]
    sheet: Option<PathBuf>,
    /// Bank name [default: the file stem].
    #[arg(long)]
    name: Option<String>,
    /// Replace the bank file if it exists.
    #[arg(long)]
    force: bool,
    /// Images read at once, and threads [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    jobs: Option<u32>,
    #[command(flatten)]
    input: InputArgs,
    /// Bank file to write (.toml).
    #[arg(long, short = 'o', value_name = "BANK.toml")]
    out: PathBuf,
    /// Print nothing but errors and warnings.
    #[arg(long, short = 'q')]
    quiet: bool,
    /// Image files, folders (read recursively) and glob patterns.
    #[arg(required = true, value_name = "INPUT")]
    inputs: Vec<PathBuf>,
}

/// A finite number ≥ 0 (f64: tolerances are compared with f64 objectives).
fn parse_fraction(s: &str) -> Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(v),
        _ => Err(format!("'{s}' is not a finite number ≥ 0")),
    }
}

/// A finite number > 0.
fn parse_positive(s: &str) -> Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 => Ok(v),
        _ => Err(format!("'{s}' is not a finite number above 0")),
    }
}

pub fn run(a: LearnArgs) -> Result<i32, Error> {
    let stop = Stop::new();
    let mut read = tapmap::image_io::ReadOptions::default();
    a.input.apply_to(&mut read);
    let job = LearnJob {
        inputs: a.inputs,
        read,
        size: a.size,
        patches: a.patches as usize,
        contrast_eps: a.contrast_eps,
        settings: LearnSettings {
            method: a.method,
            count: a.count as usize,
            whiten: a.whiten.unwrap_or(Whiten::default_for(a.method)),
            whiten_eps: a.whiten_eps,
            iterations: a.iterations,
            tolerance: a.tolerance,
            restarts: a.restarts as usize,
            seed: a.seed,
        },
        out: a.out.clone(),
        name: a.name,
        force: a.force,
        sheet: a.sheet,
        keep_patches: a.keep_patches,
        jobs: thread_count(a.jobs),
        stop: stop.clone(),
        command_line: super::command_line(),
    };
    watch_stop_signals(&stop)?;
    let quiet = a.quiet;
    let progress = move |line: &str| {
        if !quiet || line.starts_with("tapmap: warning") {
            tell!("{line}");
        }
    };
    let s = match run_learn(&job, &Terminal::new(quiet, "images"), &progress) {
        Ok(s) => s,
        Err(e) => {
            if let Some(sig) = stop.requested() {
                tell!("tapmap: {}", e.problem());
                return Ok(128 + sig);
            }
            return Err(e);
        }
    };
    if !quiet || s.failed > 0 {
        let k = &s.bank.kernels[0];
        let what = match &s.learned.detail {
            Detail::Pca { variance, total } => {
                let shown: Vec<String> = variance
                    .iter()
                    .take(4)
                    .map(|v| format!("{:.1}%", 100.0 * v / total))
                    .collect();
                format!("variance explained {}", shown.join(", "))
            }
            Detail::Clusters {
                sizes,
                objective,
                updates,
                ..
            } => format!(
                "objective {:.6e} after {updates} update(s); largest cluster {} patches",
                objective.last().copied().unwrap_or(0.0),
                sizes.first().copied().unwrap_or(0)
            ),
        };
        tell!(
            "tapmap: learned {} kernels of {}×{}×{} from {} patches of {} image(s) ({} failed); {what}\n\
             tapmap: wrote {} and {}",
            s.bank.kernels.len(),
            k.channels(),
            k.rows,
            k.cols,
            s.patches,
            s.images,
            s.failed,
            job.out.display(),
            s.sheet.display()
        );
    }
    Ok(status(s.failed))
}
