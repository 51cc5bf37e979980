//! The command line: parse flags, turn them into a checked recipe before any
//! image is read, call the library, map the outcome to an exit status
//! (0 all good, 1 some inputs failed, 2 usage or set-up error).

mod report;

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::batch::run::check_channels;
use crate::batch::{run_apply, ApplyJob, Save, ViewOptions};
use crate::border::PadMode;
use crate::engine::{ConvOptions, ConvStage, Engine};
use crate::error::Error;
use crate::geometry::{Extent, PadWidth};
use crate::io::read::{ColorMode, ReadOptions};
use crate::kernel::bankfile::bank_to_toml;
use crate::kernel::builtin::resolve_bank;
use crate::kernel::{Bank, FamilySpec, Op};
use crate::stage::recipefile::{read_recipe, RecipeSpec};
use crate::stage::{Activation, Pool, PoolKind, PoolWindow, Recipe, Stage};

/// Exit status: everything worked.
pub const EXIT_OK: i32 = 0;
/// Exit status: some inputs failed; the others were written.
pub const EXIT_SOME_FAILED: i32 = 1;
/// Exit status: usage or set-up error before any work.
pub const EXIT_USAGE: i32 = 2;

#[derive(Parser)]
#[command(
    name = "tapmap",
    version,
    about = "Apply banks of convolution kernels to images; write feature maps.",
    after_help = "Exit status: 0 all good, 1 some inputs failed (the rest were written), 2 usage or set-up error."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Run a bank or recipe over images, folders and globs; write maps, views, sheets, stats, manifest.
    #[command(after_help = "Examples:\n  \
        tapmap apply --recipe kernels/line-a-edges.recipe.toml --out runs/night sample_data\n  \
        tapmap apply --bank edges --white 4095 --save all --out runs/s1 'captures/s1/**/*.png'\n  \
        tapmap apply --bank gaussian:sigma=2 --pad reflect --stride 2 --out blur tile.tif\n  \
        tapmap apply --bank my-filters.toml --color rgb --act relu --pool max --pool-size 2 --out fm photos/\n\n\
        Outputs mirror each input's path below its folder or pattern root:\n  \
        OUT/maps/P.npy (float32 C×H×W, numpy.load), OUT/views/P/NN-name.png, OUT/sheets/P.png,\n  \
        OUT/tiff/P/NN-name.tif, OUT/stats.csv, OUT/images.csv, OUT/manifest.json.")]
    Apply(ApplyArgs),
    /// Print each stage's output size, padding, receptive field and cost for an input size.
    #[command(after_help = "Examples:\n  \
        tapmap plan --size 640x480 --bank edges\n  \
        tapmap plan --size 1024x1024 --bank blobs --extent valid --stride 2 --pool max --pool-size 2\n  \
        tapmap plan --size 4096x3000 --recipe kernels/line-a-edges.recipe.toml")]
    Plan(PlanArgs),
    /// Compare pad modes on real images: band where modes disagree, deviation figures,
    /// difference views, and (with --crop) which mode best stands in for missing pixels.
    #[command(after_help = "Examples:\n  \
        tapmap borders --bank edges --out runs/borders sample_data/line-a\n  \
        tapmap borders --bank gaussian:sigma=2 --crop 24 --out runs/borders-crop sample_data/line-a/s1-glaze\n  \
        tapmap borders --recipe kernels/pinhole-blobs.recipe.toml --modes zero,reflect,symmetric --out runs/b img.png\n\n\
        Writes OUT/borders.csv (error by distance from the edge), OUT/bands.csv (measured and\n  \
        predicted band per edge), OUT/summary.csv, OUT/views/P/NN-channel/MODE.png (|mode − median|,\n  \
        measured band outlined in amber, predicted in cyan), OUT/plots/P.png and OUT/plot.png.")]
    Borders(BordersArgs),
    /// The strongest responses of each kernel across images, with the patches they see.
    #[command(after_help = "Examples:\n  \
        tapmap probe --bank sample_data/learned/first-layer.npy --act relu --top 8 --out runs/probe sample_data\n  \
        tapmap probe --recipe kernels/pinhole-blobs.recipe.toml --top 5 --out runs/pinholes sample_data/line-a\n\n\
        Writes OUT/probe.csv, OUT/kernels/NN-name.png (one sheet per kernel) and OUT/overview.png.\n\
        Hits of one kernel in one image never have overlapping receptive fields (they are at least\n\
        ceil(R/J) output pixels apart in x or y; R receptive field, J stride product).")]
    Probe(ProbeArgs),
    /// Combine the shards of a job (OUT/shard-K-of-N) into the tables one run would write.
    #[command(after_help = "Examples:\n  \
        tapmap apply --recipe kernels/line-a-edges.recipe.toml --shard 1/2 --out runs/night captures\n  \
        tapmap apply --recipe kernels/line-a-edges.recipe.toml --shard 2/2 --out runs/night captures\n  \
        tapmap merge runs/night\n\n\
        Writes OUT/stats.csv and OUT/images.csv, byte for byte what one run over all inputs\n\
        writes, and OUT/manifest.json listing every shard's run and files. Maps, views and\n\
        sheets stay in the shard folders.")]
    Merge(MergeArgs),
    /// Built-in kernels and bank files: list, show, make, import, draw.
    #[command(subcommand)]
    Bank(BankCommand),
}

#[derive(Args, Clone)]
struct StageArgs {
    /// Recipe file (TOML): input handling and any number of conv, act and pool stages.
    /// The conv flags below then override the first conv stage.
    #[arg(long, short = 'r', value_name = "FILE")]
    recipe: Option<PathBuf>,
    /// Bank: a bank file (.toml), a shipped bank (edges, gradients, smooth, blobs, texture),
    /// or kernel families joined with '+', e.g. sobel-x+sobel-y or gaussian:sigma=2.
    #[arg(
        long,
        short = 'b',
        value_name = "NAME|FILE",
        required_unless_present = "recipe"
    )]
    bank: Option<String>,
    /// convolve (rotate taps 180°) or correlate (taps as written); default: as the bank declares.
    #[arg(long, value_name = "OP")]
    op: Option<Op>,
    /// What stands outside the image: zero, replicate, reflect, symmetric, wrap [default: zero].
    #[arg(long, value_name = "MODE")]
    pad: Option<PadMode>,
    /// How much padding: valid (none), same (output = ceil(input/stride)), full (k−1 each side) [default: same].
    #[arg(long, conflicts_with = "pad_width", value_name = "EXTENT")]
    extent: Option<Extent>,
    /// Explicit padding instead of --extent: N, or TOP,BOTTOM,LEFT,RIGHT.
    #[arg(long, value_name = "N|T,B,L,R")]
    pad_width: Option<PadWidth>,
    /// Stride: N, or ROWS,COLS [default: 1].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    stride: Option<(usize, usize)>,
    /// Dilation: N, or ROWS,COLS [default: 1].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    dilation: Option<(usize, usize)>,
    /// Activation after the conv: none, relu, leaky-relu[:SLOPE], abs, square, tanh, sigmoid.
    #[arg(long, value_name = "ACT", conflicts_with = "recipe")]
    act: Option<Activation>,
    /// Pooling after the activation: max or mean.
    #[arg(long, value_name = "KIND", conflicts_with = "recipe")]
    pool: Option<PoolKind>,
    /// Pool window: N, ROWS,COLS, or global (each map to one value) [default: 2].
    #[arg(long, value_name = "N|ROWS,COLS|global", requires = "pool")]
    pool_size: Option<String>,
    /// Pool stride: N or ROWS,COLS [default: the window size].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS", requires = "pool")]
    pool_stride: Option<(usize, usize)>,
    /// Colour handling: luma (BT.709, one channel), rgb (three channels for three-plane
    /// kernels), split (every kernel over every channel, maps named kernel@channel) [default: luma].
    #[arg(long, value_name = "MODE")]
    color: Option<ColorMode>,
    /// White level of integer samples, e.g. 4095 for 12-bit data in 16-bit files
    /// (used where the file's type can hold it) [default: full scale].
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    white: Option<u32>,
    /// Do not apply the EXIF orientation; read pixels as stored.
    #[arg(long)]
    ignore_orientation: bool,
    /// Refuse images with more pixels than N (checked from the header, before decoding).
    #[arg(long, value_name = "N", default_value_t = crate::io::read::DEFAULT_MAX_PIXELS,
          value_parser = clap::value_parser!(u64).range(1..))]
    max_pixels: u64,
    /// Memory one image may take to decode and run through the recipe (e.g. 512M, 8G);
    /// larger images fail with a message and the run goes on [default: 4G].
    #[arg(long, value_name = "BYTES", value_parser = parse_bytes)]
    max_memory: Option<u64>,
    /// Conv strategy: auto (the planner chooses; `plan` shows the choice and why),
    /// reference (slow, exact), direct, separable (rank-1 kernels), matmul (large banks),
    /// fft (large kernels that are not rank 1).
    #[arg(long, default_value = "auto", value_name = "ENGINE")]
    engine: Engine,
}

#[derive(Args)]
struct ApplyArgs {
    #[command(flatten)]
    stage: StageArgs,
    #[command(flatten)]
    io: RunArgs,
    /// What to write, comma-separated: maps, tiff, views, sheets, stats, manifest, or all.
    /// images.csv is always written.
    #[arg(long, default_value = "maps,views,stats,manifest", value_name = "LIST")]
    save: Save,
    /// Fixed value range LO,HI for every view [default: per map].
    #[arg(long, value_parser = parse_range, value_name = "LO,HI", allow_hyphen_values = true)]
    view_range: Option<(f32, f32)>,
    /// Bits per grey view sample: 8 or 16.
    #[arg(long, default_value_t = 8, value_parser = parse_depth, value_name = "BITS")]
    view_depth: u8,
    /// Threshold T for the above_fraction column of stats.csv (fraction of samples > T).
    #[arg(long, value_name = "T", allow_hyphen_values = true)]
    threshold: Option<f32>,
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
    shard: Option<crate::batch::shard::ShardSpec>,
}

#[derive(Args)]
struct MergeArgs {
    /// The --out folder the shards wrote into (holding shard-K-of-N folders).
    #[arg(value_name = "OUT")]
    out: PathBuf,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    quiet: bool,
}

/// Output folder, quietness and inputs: the same for every command that reads images.
#[derive(Args)]
struct RunArgs {
    /// Output folder (created if missing); never read as input.
    #[arg(long, short = 'o', value_name = "DIR")]
    out: PathBuf,
    /// Print nothing but errors (no progress bar, no summary unless something failed).
    #[arg(long, short = 'q')]
    quiet: bool,
    /// Image files, folders (read recursively) and glob patterns (quote them: 'captures/**/*.png').
    /// NumPy .npy arrays (H×W or C×H×W) are read when named or matched by a '*.npy' pattern.
    #[arg(required = true, value_name = "INPUT")]
    inputs: Vec<PathBuf>,
}

#[derive(Args)]
struct PlanArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Input size, WIDTHxHEIGHT.
    #[arg(long, value_parser = parse_size, value_name = "WxH")]
    size: (usize, usize),
}

#[derive(Args)]
struct BordersArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Pad modes to compare, comma-separated.
    #[arg(long, default_value = "zero,replicate,reflect,symmetric,wrap", value_parser = parse_modes, value_name = "LIST")]
    modes: ModeList,
    /// Two results agree when they differ by at most T (response units).
    #[arg(long, default_value_t = 1e-6, value_name = "T")]
    tolerance: f32,
    /// Also compare each mode with the real surroundings: cut a window N pixels in
    /// from every side, run it with each mode, compare with the full image's result.
    #[arg(long, value_name = "N")]
    crop: Option<usize>,
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

#[derive(Args)]
struct ProbeArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Hits kept per kernel.
    #[arg(long, default_value_t = 9, value_name = "K", value_parser = clap::value_parser!(u32).range(1..))]
    top: u32,
    /// Images processed at once [default: all cores].
    #[arg(long, short = 'j', value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    jobs: Option<u32>,
    #[command(flatten)]
    io: RunArgs,
}

#[derive(Subcommand)]
enum BankCommand {
    /// List the built-in kernel families with their parameters, and the shipped banks.
    List,
    /// Print a bank's kernels: taps, sum, L1 norm, rank and factors, symmetry.
    #[command(
        after_help = "Examples:\n  tapmap bank show edges\n  tapmap bank show gaussian:sigma=1,radius=2\n  tapmap bank show my-bank.toml"
    )]
    Show {
        /// A bank file, a shipped bank, or families joined with '+'.
        #[arg(value_name = "NAME|FILE")]
        bank: String,
    },
    /// Import trained weights (.npy, .npz, safetensors) as a bank file.
    #[command(after_help = "Examples:\n  \
        tapmap bank import sample_data/learned/first-layer.npy -o learned.toml\n  \
        tapmap bank import model.safetensors --tensor conv1.weight --bias conv1.bias --mean 0.485,0.456,0.406 --std 0.229,0.224,0.225 -o conv1.toml\n  \
        tapmap bank import weights.npz --tensor w --layout hwio -o w.toml")]
    Import {
        /// The weight file.
        #[arg(value_name = "FILE")]
        file: PathBuf,
        /// Weight tensor (needed when the file holds several).
        #[arg(long, value_name = "NAME")]
        tensor: Option<String>,
        /// Bias tensor (1-D, one value per output channel).
        #[arg(long, value_name = "NAME")]
        bias: Option<String>,
        /// Axis order: oihw (out×in×kh×kw) or hwio (kh×kw×in×out).
        #[arg(long, default_value = "oihw")]
        layout: crate::kernel::import::Layout,
        /// Per-channel mean of the training normalisation, in [0,1] units.
        #[arg(long, value_parser = parse_floats, value_name = "M,...", allow_hyphen_values = true)]
        mean: Option<Floats>,
        /// Per-channel std of the training normalisation, in [0,1] units.
        #[arg(long, value_parser = parse_floats, value_name = "S,...")]
        std: Option<Floats>,
        /// Op to declare (network layers compute correlate).
        #[arg(long, default_value = "correlate")]
        op: Op,
        /// Bank file to write.
        #[arg(long, short = 'o', value_name = "FILE")]
        out: PathBuf,
    },
    /// Draw a bank's taps as a sheet (PNG), one enlarged cell per kernel.
    #[command(
        after_help = "Examples:\n  tapmap bank draw edges -o edges.png\n  tapmap bank draw sample_data/learned/first-layer.safetensors -o learned.png"
    )]
    Draw {
        /// A bank file, weight file, shipped bank, or families joined with '+'.
        #[arg(value_name = "NAME|FILE")]
        bank: String,
        /// PNG to write.
        #[arg(long, short = 'o', value_name = "FILE")]
        out: PathBuf,
    },
    /// Write a bank file from built-in families.
    #[command(after_help = "Examples:\n  \
        tapmap bank make sobel-x sobel-y -o edges.toml\n  \
        tapmap bank make gaussian sigma=2 radius=6 -o blur.toml\n  \
        tapmap bank make gabor:theta=0 gabor:theta=90 --name cracks -o cracks.toml")]
    Make {
        /// Families with parameters: FAMILY[:KEY=VALUE,...]; a lone KEY=VALUE applies to the family before it.
        #[arg(required = true, value_name = "SPEC")]
        specs: Vec<String>,
        /// File to write.
        #[arg(long, short = 'o', value_name = "FILE")]
        out: PathBuf,
        /// Bank name (default: the file stem).
        #[arg(long)]
        name: Option<String>,
        /// Op the taps are meant for.
        #[arg(long, default_value = "correlate")]
        op: Op,
    },
}

/// A comma-separated list of finite numbers.
#[derive(Clone, Debug)]
struct Floats(Vec<f64>);

fn parse_floats(s: &str) -> Result<Floats, String> {
    s.split(',')
        .map(|p| {
            p.trim()
                .parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| format!("'{p}' is not a finite number"))
        })
        .collect::<Result<Vec<_>, _>>()
        .map(Floats)
}

fn parse_pair(s: &str) -> Result<(usize, usize), String> {
    let parts: Vec<&str> = s.split(',').collect();
    let num = |p: &str| {
        p.trim()
            .parse::<usize>()
            .map_err(|_| format!("'{p}' is not a whole number"))
    };
    match parts.as_slice() {
        [a] => {
            let v = num(a)?;
            Ok((v, v))
        }
        [a, b] => Ok((num(a)?, num(b)?)),
        _ => Err(format!("'{s}': give N or ROWS,COLS")),
    }
}

fn parse_range(s: &str) -> Result<(f32, f32), String> {
    let (a, b) = s
        .split_once(',')
        .ok_or_else(|| format!("'{s}': give LO,HI"))?;
    let num = |p: &str| {
        p.trim()
            .parse::<f32>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| format!("'{p}' is not a finite number"))
    };
    let (lo, hi) = (num(a)?, num(b)?);
    if lo >= hi {
        return Err(format!("'{s}': LO must be below HI"));
    }
    Ok((lo, hi))
}

fn parse_depth(s: &str) -> Result<u8, String> {
    match s {
        "8" => Ok(8),
        "16" => Ok(16),
        _ => Err(format!("view depth '{s}': give 8 or 16")),
    }
}

fn parse_size(s: &str) -> Result<(usize, usize), String> {
    let (w, h) = s
        .split_once(['x', 'X'])
        .ok_or_else(|| format!("size '{s}' is not WIDTHxHEIGHT, e.g. 640x480"))?;
    let num = |p: &str| {
        p.trim()
            .parse::<usize>()
            .ok()
            .filter(|v| *v > 0)
            .ok_or_else(|| format!("size '{s}': '{p}' is not a positive whole number"))
    };
    Ok((num(w)?, num(h)?))
}

impl StageArgs {
    /// Turns the flags (and the recipe file, if any) into a checked recipe spec:
    /// with a recipe, conv flags override its first conv stage; without one, the
    /// flags make a one-conv recipe with optional act and pool.
    fn spec(&self) -> Result<RecipeSpec, Error> {
        for (what, v) in [("stride", self.stride), ("dilation", self.dilation)] {
            if let Some((a, b)) = v {
                if a == 0 || b == 0 {
                    return Err(Error::Geometry(format!(
                        "{what} is 0; it must be at least 1"
                    )));
                }
            }
        }
        let mut spec = match &self.recipe {
            Some(path) => read_recipe(path)?,
            None => {
                let bank = resolve_bank(self.bank.as_deref().unwrap_or_default())?;
                let mut stages = vec![Stage::Conv(ConvStage {
                    bank,
                    options: ConvOptions::default(),
                })];
                if let Some(act) = self.act.filter(|a| *a != Activation::None) {
                    stages.push(Stage::Act(act));
                }
                if let Some(kind) = self.pool {
                    stages.push(Stage::Pool(Pool {
                        kind,
                        window: self.pool_window()?,
                    }));
                }
                RecipeSpec {
                    input: ReadOptions::default(),
                    recipe: Recipe { stages },
                }
            }
        };
        let first = spec.recipe.stages.iter_mut().find_map(|s| match s {
            Stage::Conv(c) => Some(c),
            _ => None,
        });
        match first {
            Some(conv) => {
                if self.recipe.is_some() {
                    if let Some(b) = &self.bank {
                        conv.bank = resolve_bank(b)?;
                    }
                }
                let o = &mut conv.options;
                o.op = self.op.or(o.op);
                o.pad = self.pad.unwrap_or(o.pad);
                o.extent = self
                    .pad_width
                    .map(Extent::Explicit)
                    .or(self.extent)
                    .unwrap_or(o.extent);
                o.stride = self.stride.unwrap_or(o.stride);
                o.dilation = self.dilation.unwrap_or(o.dilation);
            }
            None if self.bank.is_some()
                || self.op.is_some()
                || self.pad.is_some()
                || self.extent.is_some()
                || self.pad_width.is_some()
                || self.stride.is_some()
                || self.dilation.is_some() =>
            {
                return Err(Error::Stage(
                    "conv flags were given but the recipe has no conv stage".into(),
                ));
            }
            None => {}
        }
        if let Some(c) = self.color {
            spec.input.color = c;
        }
        if self.white.is_some() {
            spec.input.white = self.white;
        }
        if self.ignore_orientation {
            spec.input.apply_orientation = false;
        }
        spec.input.max_pixels = self.max_pixels;
        if let Some(m) = self.max_memory {
            spec.input.max_memory = m;
        }
        Ok(spec)
    }

    fn pool_window(&self) -> Result<PoolWindow, Error> {
        Ok(match self.pool_size.as_deref() {
            Some("global") => PoolWindow::Global,
            other => {
                let size = parse_pair(other.unwrap_or("2"))
                    .map_err(|e| Error::Stage(format!("--pool-size {e}")))?;
                let stride = self.pool_stride.unwrap_or(size);
                if size.0 == 0 || size.1 == 0 || stride.0 == 0 || stride.1 == 0 {
                    return Err(Error::Stage(
                        "pool size and stride must be at least 1".into(),
                    ));
                }
                PoolWindow::Sized { size, stride }
            }
        })
    }
}

/// SIGINT and SIGTERM ask a run to stop: images in flight are finished, no new
/// ones are started, tables are written for what is done, and the exit status is
/// 128 + the signal (130, 143). A second signal ends the process at once.
fn watch_stop_signals() -> Result<(), Error> {
    use signal_hook::consts::{SIGINT, SIGTERM};
    use std::sync::atomic::AtomicBool;
    use std::sync::Arc;
    let armed = Arc::new(AtomicBool::new(false));
    for sig in [SIGINT, SIGTERM] {
        let e = |e: std::io::Error| Error::Stage(format!("cannot watch signal {sig}: {e}"));
        // Order matters: the exit check runs before the flag is set, so only a
        // second signal finds it armed.
        signal_hook::flag::register_conditional_shutdown(sig, 128 + sig, Arc::clone(&armed))
            .map_err(e)?;
        signal_hook::flag::register(sig, Arc::clone(&armed)).map_err(e)?;
        signal_hook::flag::register_usize(
            sig,
            Arc::clone(crate::batch::run::stop_signal()),
            sig as usize,
        )
        .map_err(e)?;
    }
    Ok(())
}

fn parse_bytes(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let n: u64 = num
        .parse()
        .map_err(|_| format!("'{s}' is not a size such as 512M or 8G"))?;
    let shift = match unit.trim().to_ascii_uppercase().as_str() {
        "" | "B" => 0,
        "K" | "KB" | "KIB" => 10,
        "M" | "MB" | "MIB" => 20,
        "G" | "GB" | "GIB" => 30,
        "T" | "TB" | "TIB" => 40,
        _ => {
            return Err(format!(
                "'{s}': unknown unit; use K, M, G or T (powers of 1024)"
            ))
        }
    };
    n.checked_mul(1u64 << shift)
        .filter(|v| *v > 0)
        .ok_or_else(|| format!("'{s}' is out of range"))
}

/// Exit status after a run over inputs: 1 when any failed.
fn status(failed: usize) -> i32 {
    if failed > 0 {
        EXIT_SOME_FAILED
    } else {
        EXIT_OK
    }
}

/// Threads to use (`--jobs`, default all cores); sizes the rayon pool the conv
/// engine runs on to match, so nothing is oversubscribed.
fn thread_count(jobs: Option<u32>) -> usize {
    let n = jobs.map_or_else(
        || std::thread::available_parallelism().map_or(1, |n| n.get()),
        |j| j as usize,
    );
    let _ = rayon::ThreadPoolBuilder::new()
        .num_threads(n)
        .build_global();
    n
}

/// Runs the command line; returns the exit status.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() { EXIT_USAGE } else { EXIT_OK };
        }
    };
    match run(cli) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("tapmap: error: {e}");
            EXIT_USAGE
        }
    }
}

fn run(cli: Cli) -> Result<i32, Error> {
    match cli.command {
        Command::Apply(a) => apply(a),
        Command::Plan(p) => {
            let spec = p.stage.spec()?;
            check_channels(&spec)?;
            let (w, h) = p.size;
            let channels = if spec.input.color == ColorMode::Rgb {
                3
            } else {
                1
            };
            let recipe = spec.recipe;
            let plans = recipe.plan(channels, h, w, p.stage.engine)?;
            print!("{}", report::plan_table((channels, h, w), &plans));
            Ok(EXIT_OK)
        }
        Command::Borders(b) => borders_cmd(b),
        Command::Merge(m) => {
            let r = crate::batch::merge::merge(&m.out, std::env::args().collect())?;
            if !m.quiet || r.failed > 0 {
                eprintln!(
                    "tapmap: merged {} shards: {} processed, {} failed; tables in {}",
                    r.shards,
                    r.processed,
                    r.failed,
                    m.out.display()
                );
            }
            Ok(status(r.failed))
        }
        Command::Probe(p) => probe_cmd(p),
        Command::Bank(BankCommand::Import {
            file,
            tensor,
            bias,
            layout,
            mean,
            std,
            op,
            out,
        }) => {
            let opts = crate::kernel::import::ImportOptions {
                tensor,
                bias,
                layout,
                mean: mean.map(|f| f.0),
                std: std.map(|f| f.0),
                op: Some(op),
            };
            let bank = crate::kernel::import::import_bank(&file, &opts)?;
            let text = bank_to_toml(&bank)?;
            crate::io::atomic::write_atomic(&out, |w| w.write_all(text.as_bytes()))?;
            let k = &bank.kernels[0];
            println!(
                "wrote {} ({} kernels of {}×{}×{}, op {}{})",
                out.display(),
                bank.kernels.len(),
                k.channels(),
                k.rows,
                k.cols,
                bank.op,
                if bank.normalize.is_some() {
                    ", with input normalisation"
                } else {
                    ""
                }
            );
            Ok(EXIT_OK)
        }
        Command::Bank(BankCommand::Draw { bank, out }) => {
            let b = resolve_bank(&bank)?;
            let img = crate::render::taps::draw_bank(&b);
            crate::render::write_png(
                &out,
                img.as_raw(),
                img.width(),
                img.height(),
                image::ExtendedColorType::Rgb8,
            )?;
            println!("wrote {} ({} kernels)", out.display(), b.kernels.len());
            Ok(EXIT_OK)
        }
        Command::Bank(BankCommand::List) => {
            print!("{}", report::family_list());
            Ok(EXIT_OK)
        }
        Command::Bank(BankCommand::Show { bank }) => {
            print!("{}", report::bank_details(&resolve_bank(&bank)?));
            Ok(EXIT_OK)
        }
        Command::Bank(BankCommand::Make {
            specs,
            out,
            name,
            op,
        }) => {
            let bank = make_bank(&specs, &out, name, op)?;
            let text = bank_to_toml(&bank)?;
            crate::io::atomic::write_atomic(&out, |w| w.write_all(text.as_bytes()))?;
            println!("wrote {} ({} kernels)", out.display(), bank.kernels.len());
            Ok(EXIT_OK)
        }
    }
}

fn make_bank(
    specs: &[String],
    out: &std::path::Path,
    name: Option<String>,
    op: Op,
) -> Result<Bank, Error> {
    let mut parsed: Vec<FamilySpec> = Vec::new();
    for s in specs {
        match (s.contains('='), s.contains(':'), parsed.last_mut()) {
            (true, false, Some(last)) => {
                let extra = FamilySpec::parse(&format!("x:{s}"))?;
                last.params.extend(extra.params);
            }
            (true, false, None) => {
                return Err(Error::Kernel(format!(
                    "parameter '{s}' comes before any family"
                )))
            }
            _ => parsed.push(FamilySpec::parse(s)?),
        }
    }
    let kernels = parsed
        .iter()
        .map(|s| s.build(None))
        .collect::<Result<Vec<_>, _>>()?;
    let name = name.unwrap_or_else(|| {
        out.file_stem()
            .map_or_else(|| "bank".into(), |s| s.to_string_lossy().into_owned())
    });
    let bank = Bank {
        normalize: None,
        name,
        op,
        description: None,
        kernels,
    };
    bank.validate()?;
    Ok(bank)
}

fn apply(a: ApplyArgs) -> Result<i32, Error> {
    let spec = a.stage.spec()?;
    // One pool for the engine's row bands; image workers are separate (see batch::run).
    let jobs = thread_count(a.jobs);
    let job = ApplyJob {
        spec,
        engine: a.stage.engine,
        out_dir: a.io.out.clone(),
        inputs: a.io.inputs,
        save: a.save,
        view: ViewOptions {
            range: a.view_range,
            depth16: a.view_depth == 16,
        },
        threshold: a.threshold,
        jobs,
        command_line: std::env::args().collect(),
        progress: !a.io.quiet,
        shard: a
            .shard
            .map(|s| crate::batch::shard::resolve(s, &|k| std::env::var(k).ok()))
            .transpose()?,
        resume: a.resume,
    };
    watch_stop_signals()?;
    let summary = run_apply(&job, &|msg| eprintln!("tapmap: {msg}"))?;
    let signal = crate::batch::run::stop_signal().load(std::sync::atomic::Ordering::SeqCst);
    if !a.io.quiet || summary.failed > 0 || signal != 0 {
        let rate = if summary.seconds > 0.0 {
            (summary.processed + summary.failed - summary.resumed) as f64 / summary.seconds
        } else {
            0.0
        };
        let mut extra = String::new();
        if a.resume {
            extra += &format!(", {} taken from the earlier run", summary.resumed);
        }
        if signal != 0 {
            extra += &format!(
                ", stopped by signal {signal} with {} not started (finish with --resume)",
                summary.not_run
            );
        }
        eprintln!(
            "tapmap: {} processed, {} failed{extra}, {:.2} s ({rate:.1} images/s); {} files in {} (see images.csv{})",
            summary.processed,
            summary.failed,
            summary.seconds,
            summary.files,
            summary.dir.display(),
            if a.save.manifest { ", manifest.json" } else { "" }
        );
    }
    if signal != 0 {
        return Ok(128 + signal as i32);
    }
    Ok(status(summary.failed))
}

fn borders_cmd(b: BordersArgs) -> Result<i32, Error> {
    use crate::borders::output as bo;
    let spec = b.stage.spec()?;
    check_channels(&spec)?;
    let modes = b.modes.0.clone();
    if b.tolerance.is_nan() || b.tolerance < 0.0 {
        return Err(Error::Stage("--tolerance must be a number ≥ 0".into()));
    }
    let items = crate::batch::inputs::expand_inputs(&b.io.inputs, &b.io.out)?;
    std::fs::create_dir_all(&b.io.out).map_err(|e| Error::io(&b.io.out, e))?;
    let (mut rows, mut bands, mut summary_rows) = (Vec::new(), Vec::new(), Vec::new());
    let mut all_curves: Vec<(PadMode, Vec<f64>, usize)> = Vec::new();
    let (mut ok, mut failed) = (0, 0);
    let crop = b.crop;
    for item in &items {
        let path = item.rel_string();
        let result = (|| -> Result<(), Error> {
            if let Some(p) = &item.problem {
                return Err(Error::Stage(p.clone()));
            }
            let img = crate::io::read::read_image(&item.source, &spec.input)?;
            let recipe = spec.recipe_for(&img.channel_names)?;
            let names = recipe.channel_names(img.data.dim().0);
            let st = crate::borders::study(
                &recipe,
                img.data.view(),
                &names,
                &modes,
                b.tolerance,
                crop,
                b.stage.engine,
            )?;
            let summary = bo::summarise(&st);
            if !b.io.quiet {
                print!("{}", bo::summary_text(&path, &st, &summary));
            }
            let best = bo::best(&summary);
            for (i, m) in summary.iter().enumerate() {
                let opt = |v: Option<f64>| v.map_or(String::new(), |x| x.to_string());
                summary_rows.push(vec![
                    path.clone(),
                    m.mode.name().to_string(),
                    m.band.to_string(),
                    m.mean_dev.to_string(),
                    m.max_dev.to_string(),
                    opt(m.crop_mean),
                    opt(m.crop_max),
                    (Some(i) == best).to_string(),
                ]);
            }
            bo::borders_rows(&path, &st, &mut rows);
            bo::band_rows(&path, &st, &mut bands);
            let stem = item.stem_path();
            bo::write_difference_views(&b.io.out.join("views").join(&stem), &st, &modes)?;
            let curves = bo::curves(&st);
            let plot = item.output_file(&b.io.out.join("plots"), "png");
            std::fs::create_dir_all(plot.parent().unwrap_or(&b.io.out))
                .map_err(|e| Error::io(&plot, e))?;
            let what = if crop.is_some() {
                "crop study: error against the real surroundings"
            } else {
                "deviation from the median of all modes"
            };
            bo::write_plot(
                &plot,
                &format!("{path}: {what}"),
                "mean |error| (response units)",
                &curves,
            )?;
            for (m, pts) in curves {
                match all_curves.iter_mut().find(|(mm, _, _)| *mm == m) {
                    Some((_, acc, n)) => {
                        if acc.len() < pts.len() {
                            acc.resize(pts.len(), 0.0);
                        }
                        for (a, p) in acc.iter_mut().zip(&pts) {
                            *a += if p.is_finite() { *p } else { 0.0 };
                        }
                        *n += 1;
                    }
                    None => all_curves.push((
                        m,
                        pts.iter()
                            .map(|p| if p.is_finite() { *p } else { 0.0 })
                            .collect(),
                        1,
                    )),
                }
            }
            Ok(())
        })();
        match result {
            Ok(()) => ok += 1,
            Err(e) => {
                failed += 1;
                eprintln!(
                    "tapmap: {}: {}",
                    item.source.display(),
                    e.to_string()
                        .replace(&format!("{}: ", item.source.display()), "")
                );
            }
        }
    }
    bo::write_csv(
        &b.io.out.join("borders.csv"),
        &[
            "path", "study", "channel", "name", "mode", "distance", "mean_abs", "max_abs", "pixels",
        ],
        &rows,
    )?;
    bo::write_csv(
        &b.io.out.join("bands.csv"),
        &["path", "channel", "name", "edge", "band", "predicted"],
        &bands,
    )?;
    bo::write_csv(
        &b.io.out.join("summary.csv"),
        &[
            "path",
            "mode",
            "band",
            "mean_dev",
            "max_dev",
            "crop_mean",
            "crop_max",
            "best",
        ],
        &summary_rows,
    )?;
    if !all_curves.is_empty() {
        let curves: Vec<(PadMode, Vec<f64>)> = all_curves
            .into_iter()
            .map(|(m, acc, n)| (m, acc.into_iter().map(|v| v / n as f64).collect()))
            .collect();
        let what = if crop.is_some() {
            "all images: error against the real surroundings"
        } else {
            "all images: deviation from the median of all modes"
        };
        bo::write_plot(
            &b.io.out.join("plot.png"),
            what,
            "mean |error| (response units)",
            &curves,
        )?;
    }
    if !b.io.quiet || failed > 0 {
        eprintln!(
            "tapmap: {ok} image(s) studied, {failed} failed; results in {}",
            b.io.out.display()
        );
    }
    Ok(status(failed))
}

fn probe_cmd(p: ProbeArgs) -> Result<i32, Error> {
    use crate::probe::{channel_hits, merge, Hit};
    use crate::render::sheet::{sheet, sheet_with_columns};
    use std::sync::Mutex;
    let spec = p.stage.spec()?;
    check_channels(&spec)?;
    let k = p.top as usize;
    let jobs = thread_count(p.jobs);
    let items = crate::batch::inputs::expand_inputs(&p.io.inputs, &p.io.out)?;
    std::fs::create_dir_all(&p.io.out).map_err(|e| Error::io(&p.io.out, e))?;
    // Per channel: (name, best hits). Channel names come from the first image.
    let best: Mutex<Vec<(String, Vec<Hit>)>> = Mutex::new(Vec::new());
    let failures: Mutex<Vec<(usize, String)>> = Mutex::new(Vec::new());
    crate::batch::run::for_each_parallel(&items, jobs, |i, item| {
        let result = (|| -> Result<(), Error> {
            if let Some(m) = &item.problem {
                return Err(Error::Stage(m.clone()));
            }
            let img = crate::io::read::read_image(&item.source, &spec.input)?;
            let recipe = spec.recipe_for(&img.channel_names)?;
            let (c, h, w) = img.data.dim();
            let fields = crate::borders::channel_fields(&recipe, c, h, w)?;
            let names = recipe.channel_names(c);
            let maps = recipe.run(img.data.clone(), p.stage.engine)?;
            let maps = maps.as_standard_layout();
            let (oc, oh, ow) = maps.dim();
            let data = maps.as_slice().expect("standard layout");
            let path = item.rel_string();
            let hits: Vec<Vec<Hit>> = (0..oc)
                .map(|ch| {
                    channel_hits(
                        &data[ch * oh * ow..(ch + 1) * oh * ow],
                        ow,
                        k,
                        fields[ch],
                        &img,
                        &path,
                    )
                })
                .collect();
            let mut b = best.lock().expect("no panics under the lock");
            if b.is_empty() {
                *b = names.iter().map(|n| (n.clone(), Vec::new())).collect();
            }
            if b.len() != oc {
                return Err(Error::Stage(format!(
                    "gives {oc} channels but earlier images gave {}",
                    b.len()
                )));
            }
            for (slot, new) in b.iter_mut().zip(hits) {
                merge(&mut slot.1, new, k);
            }
            Ok(())
        })();
        if let Err(e) = result {
            let msg = e
                .to_string()
                .replace(&format!("{}: ", item.source.display()), "");
            failures
                .lock()
                .expect("no panics under the lock")
                .push((i, msg));
        }
    });
    let mut failures = failures.into_inner().expect("workers done");
    failures.sort();
    for (i, m) in &failures {
        eprintln!("tapmap: {}: {m}", items[*i].source.display());
    }
    let best = best.into_inner().expect("workers done");
    let mut rows = Vec::new();
    let taps = crate::render::colormap::table();
    let last_bank = spec.recipe.stages.iter().rev().find_map(|s| match s {
        Stage::Conv(c) => Some(c.bank.clone()),
        _ => None,
    });
    let kernels_dir = p.io.out.join("kernels");
    std::fs::create_dir_all(&kernels_dir).map_err(|e| Error::io(&kernels_dir, e))?;
    let mut overview = Vec::new();
    for (ch, (name, hits)) in best.iter().enumerate() {
        for (r, hit) in hits.iter().enumerate() {
            rows.push(vec![
                ch.to_string(),
                name.clone(),
                (r + 1).to_string(),
                hit.path.clone(),
                hit.x.to_string(),
                hit.y.to_string(),
                hit.response.to_string(),
                hit.region.1.to_string(),
                hit.region.0.to_string(),
                hit.region.3.to_string(),
                hit.region.2.to_string(),
                hit.clipped.to_string(),
            ]);
        }
        let cells: Vec<(String, image::RgbImage)> = hits
            .iter()
            .enumerate()
            .map(|(r, h)| {
                (
                    format!(
                        "#{} {:.4}{}",
                        r + 1,
                        h.response,
                        if h.clipped { " clip" } else { "" }
                    ),
                    h.patch.clone(),
                )
            })
            .collect();
        if !cells.is_empty() {
            let s = sheet(
                &format!("{name}: top {} of {} image(s)", cells.len(), items.len()),
                &cells,
            );
            let path = kernels_dir.join(format!(
                "{ch:02}-{}.png",
                crate::batch::run::safe_name(name)
            ));
            crate::render::write_png(
                &path,
                s.as_raw(),
                s.width(),
                s.height(),
                image::ExtendedColorType::Rgb8,
            )?;
        }
        let kernel = last_bank.as_ref().and_then(|b| {
            let base = name.split('@').next().unwrap_or(name);
            b.kernels.iter().find(|kk| kk.name == base)
        });
        let tap_cell = kernel.map_or_else(
            || image::RgbImage::new(1, 1),
            |kk| crate::render::taps::taps_picture(kk, &taps),
        );
        overview.push((format!("{name} taps"), tap_cell));
        for c in 0..k {
            match cells.get(c) {
                Some(cell) => overview.push(cell.clone()),
                None => overview.push((
                    String::new(),
                    image::RgbImage::from_pixel(1, 1, image::Rgb([30, 33, 36])),
                )),
            }
        }
    }
    if !overview.is_empty() {
        let s = sheet_with_columns(
            "probe: each row a kernel, its taps, then its strongest patches",
            &overview,
            k + 1,
        );
        crate::render::write_png(
            &p.io.out.join("overview.png"),
            s.as_raw(),
            s.width(),
            s.height(),
            image::ExtendedColorType::Rgb8,
        )?;
    }
    crate::borders::output::write_csv(
        &p.io.out.join("probe.csv"),
        &[
            "channel", "kernel", "rank", "path", "x", "y", "response", "box_x", "box_y", "box_w",
            "box_h", "clipped",
        ],
        &rows,
    )?;
    if !p.io.quiet || !failures.is_empty() {
        eprintln!(
            "tapmap: probed {} image(s), {} failed; {} kernel(s), top {k}; results in {}",
            items.len() - failures.len(),
            failures.len(),
            best.len(),
            p.io.out.display()
        );
    }
    Ok(status(failures.len()))
}
