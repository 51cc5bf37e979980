//! Flags that several commands share, and the parsers of flag values: the
//! first phase of two (flags are checked here without doing any work, then
//! turned into the library's job objects).

use std::path::PathBuf;

use clap::Args;

use tapmap::border::PadMode;
use tapmap::engine::Engine;
use tapmap::error::Error;
use tapmap::geometry::{Extent, PadWidth};
use tapmap::image_io::{ColorMode, ReadOptions};
use tapmap::kernel::builtin::resolve_bank;
use tapmap::kernel::Op;
use tapmap::stage::recipefile::read_recipe;
use tapmap::stage::{Activation, PadReason, Pool, PoolKind, PoolWindow, Recipe, RecipeSpec};

#[derive(Args, Clone)]
pub struct StageArgs {
    /// Recipe file (TOML): input handling and any number of conv, act and pool stages.
    /// The conv flags below then override the first conv stage.
    #[arg(long, short = 'r', value_name = "FILE")]
    pub recipe: Option<PathBuf>,
    /// Bank: a bank file (.toml), a shipped bank (edges, gradients, smooth, blobs, texture),
    /// or kernel families joined with '+', e.g. sobel-x+sobel-y or gaussian:sigma=2.
    #[arg(
        long,
        short = 'b',
        value_name = "NAME|FILE",
        required_unless_present = "recipe"
    )]
    pub bank: Option<String>,
    /// convolve (rotate taps 180°) or correlate (taps as written); default: as the bank declares.
    #[arg(long, value_name = "OP")]
    pub op: Option<Op>,
    /// What stands outside the image: zero, replicate, reflect, symmetric, wrap [default: what
    /// the bank file names; zero for trained weights; symmetric for built-in and hand-written banks].
    #[arg(long, value_name = "MODE")]
    pub pad: Option<PadMode>,
    /// How much padding: valid (none), same (output = ceil(input/stride)), full (k−1 each side) [default: same].
    #[arg(long, conflicts_with = "pad_width", value_name = "EXTENT")]
    pub extent: Option<Extent>,
    /// Explicit padding instead of --extent: N, or TOP,BOTTOM,LEFT,RIGHT.
    #[arg(long, value_name = "N|T,B,L,R")]
    pub pad_width: Option<PadWidth>,
    /// Stride: N, or ROWS,COLS [default: 1].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    pub stride: Option<(usize, usize)>,
    /// Dilation: N, or ROWS,COLS [default: 1].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    pub dilation: Option<(usize, usize)>,
    /// Activation after the conv: none, relu, leaky-relu[:SLOPE], abs, square, tanh, sigmoid.
    #[arg(long, value_name = "ACT", conflicts_with = "recipe")]
    pub act: Option<Activation>,
    /// Pooling after the activation: max or mean.
    #[arg(long, value_name = "KIND", conflicts_with = "recipe")]
    pub pool: Option<PoolKind>,
    /// Pool window: N, ROWS,COLS, or global (each map to one value) [default: 2].
    #[arg(long, value_name = "N|ROWS,COLS|global", requires = "pool")]
    pub pool_size: Option<String>,
    /// Pool stride: N or ROWS,COLS [default: the window size].
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS", requires = "pool")]
    pub pool_stride: Option<(usize, usize)>,
    #[command(flatten)]
    pub input: InputArgs,
    /// Conv strategy: auto (the planner chooses; `reckon` shows the choice and why),
    /// reference (slow, exact), direct, separable (rank-1 kernels), matmul (large banks),
    /// fft (large kernels that are not rank 1).
    #[arg(long, default_value = "auto", value_name = "ENGINE")]
    pub engine: Engine,
}

/// How images are read: the same for every command that reads them.
#[derive(Args, Clone)]
pub struct InputArgs {
    /// Colour handling: luma (BT.709, one channel), rgb (three channels for three-plane
    /// kernels), split (every kernel over every channel, maps named kernel@channel) [default: luma].
    #[arg(long, value_name = "MODE")]
    pub color: Option<ColorMode>,
    /// White level of integer samples, e.g. 4095 for 12-bit data in 16-bit files
    /// (used where the file's type can hold it) [default: full scale].
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..=65535))]
    pub white: Option<u32>,
    /// Do not apply the EXIF orientation; read pixels as stored.
    #[arg(long)]
    pub ignore_orientation: bool,
    /// Refuse images with more pixels than N (checked from the header, before decoding).
    #[arg(long, value_name = "N", default_value_t = tapmap::limits::DEFAULT_MAX_PIXELS,
          value_parser = clap::value_parser!(u64).range(1..))]
    pub max_pixels: u64,
    /// Memory one image may take to decode and run through the recipe (e.g. 512M, 8G);
    /// larger images fail with a message and the run goes on [default: 4G].
    #[arg(long, value_name = "BYTES", value_parser = tapmap::limits::parse_bytes)]
    pub max_memory: Option<u64>,
}

impl InputArgs {
    /// The flags applied to `opts` (a recipe's input section, or the defaults).
    pub fn apply_to(&self, opts: &mut ReadOptions) {
        if let Some(c) = self.color {
            opts.color = c;
        }
        if self.white.is_some() {
            opts.white = self.white;
        }
        if self.ignore_orientation {
            opts.apply_orientation = false;
        }
        opts.limits.max_pixels = self.max_pixels;
        if let Some(m) = self.max_memory {
            opts.limits.max_memory = m;
        }
    }
}

/// Combine flags: maps made from the first conv stage's maps (for the commands
/// that run a whole recipe: apply and reckon).
#[derive(Args, Clone, Default)]
pub struct CombineArgs {
    /// Add maps made from the first conv stage's maps, after them: magnitude, energy,
    /// orientation, max, argmax, sum, mean (each over all its maps), or the sets
    /// gradient (magnitude and orientation of the x/y pair, e.g. sobel-x and sobel-y)
    /// and gabor-energy (energy per angle, the strongest and its angle); comma-separated.
    #[arg(long, value_name = "KIND[,KIND...]", value_delimiter = ',')]
    pub combine: Vec<tapmap::stage::CombineWhat>,
    /// Add a thin-edge map (Canny: non-maximum suppression, then hysteresis between
    /// LOW and HIGH in gradient-magnitude units) of the x/y pair of the first conv stage.
    #[arg(long, value_name = "LOW,HIGH", value_parser = parse_low_high)]
    pub thin: Option<(f64, f64)>,
    /// Keep only the maps --combine and --thin make, not the conv maps they read.
    #[arg(long)]
    pub drop_sources: bool,
}

impl CombineArgs {
    /// Adds the flags' combine stage right after the first conv stage of `spec`
    /// and checks the recipe again.
    pub fn apply_to(&self, spec: &mut RecipeSpec) -> Result<(), Error> {
        use tapmap::stage::{Combine, CombineItem, CombineKind, CombineWhat, Stage};
        let mut items: Vec<CombineItem> = self
            .combine
            .iter()
            .cloned()
            .map(CombineItem::of_all)
            .collect();
        if let Some((low, high)) = self.thin {
            items.push(CombineItem::of_all(CombineWhat::Kind(CombineKind::Thin {
                low,
                high,
            })));
        }
        if items.is_empty() {
            if self.drop_sources {
                return Err(Error::Usage(
                    "--drop-sources goes with --combine or --thin".into(),
                ));
            }
            return Ok(());
        }
        let Some(first) = spec
            .recipe
            .stages
            .iter()
            .position(|s| matches!(s, Stage::Conv(_)))
        else {
            return Err(Error::Usage(
                "--combine and --thin read the first conv stage's maps, but the recipe has none"
                    .into(),
            ));
        };
        spec.recipe.stages.insert(
            first + 1,
            Stage::Combine(Combine {
                items,
                keep: !self.drop_sources,
            }),
        );
        spec.validate()
    }
}

/// `LOW,HIGH`: two finite numbers, 0 ≤ LOW ≤ HIGH.
pub fn parse_low_high(s: &str) -> Result<(f64, f64), String> {
    let (a, b) = s
        .split_once(',')
        .ok_or_else(|| format!("'{s}' is not LOW,HIGH"))?;
    let num = |p: &str| {
        p.trim()
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite())
            .ok_or_else(|| format!("'{p}' is not a finite number"))
    };
    let (lo, hi) = (num(a)?, num(b)?);
    if !(0.0 <= lo && lo <= hi) {
        return Err(format!("thresholds {lo},{hi}: need 0 ≤ LOW ≤ HIGH"));
    }
    Ok((lo, hi))
}

/// Output folder, quietness and inputs: the same for every command that reads images.
#[derive(Args)]
pub struct RunArgs {
    /// Output folder (created if missing); never read as input.
    #[arg(long, short = 'o', value_name = "DIR")]
    pub out: PathBuf,
    /// Print nothing but errors (no progress bar, no summary unless something failed).
    #[arg(long, short = 'q')]
    pub quiet: bool,
    /// Image files, folders (read recursively) and glob patterns (quote them: 'captures/**/*.png').
    /// NumPy .npy arrays (H×W or C×H×W) are read when named or matched by a '*.npy' pattern.
    #[arg(required = true, value_name = "INPUT")]
    pub inputs: Vec<PathBuf>,
}

/// A comma-separated list of finite numbers.
#[derive(Clone, Debug)]
pub struct Floats(pub Vec<f64>);

pub fn parse_floats(s: &str) -> Result<Floats, String> {
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

/// One finite number that float32 holds (`nan`, `inf` and 1e39 are refused).
pub fn parse_finite(s: &str) -> Result<f32, String> {
    s.trim()
        .parse::<f32>()
        .ok()
        .filter(|v| v.is_finite())
        .ok_or_else(|| format!("'{s}' is not a finite number (float32: up to ±3.4e38)"))
}

/// A finite number ≥ 0.
pub fn parse_tolerance(s: &str) -> Result<f32, String> {
    parse_finite(s).and_then(|v| {
        if v >= 0.0 {
            Ok(v)
        } else {
            Err(format!("'{s}' is below 0"))
        }
    })
}

pub fn parse_pair(s: &str) -> Result<(usize, usize), String> {
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

pub fn parse_range(s: &str) -> Result<(f32, f32), String> {
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

/// A duration: a number of seconds (`3`, `0.5`) or with units (`500ms`,
/// `2s`, `1m 30s`).
pub fn parse_duration(s: &str) -> Result<std::time::Duration, String> {
    let t = s.trim();
    let d = match t.parse::<f64>() {
        Ok(secs) if secs.is_finite() && secs >= 0.0 => std::time::Duration::from_secs_f64(secs),
        Ok(_) => return Err(format!("duration '{s}' must be zero or more seconds")),
        Err(_) => humantime::parse_duration(t)
            .map_err(|e| format!("duration '{s}': {e}; give seconds (3, 0.5) or e.g. 500ms, 2s"))?,
    };
    if d > std::time::Duration::from_secs(86_400) {
        return Err(format!("duration '{s}' is longer than a day"));
    }
    Ok(d)
}

pub fn parse_depth(s: &str) -> Result<u8, String> {
    match s {
        "8" => Ok(8),
        "16" => Ok(16),
        _ => Err(format!("view depth '{s}': give 8 or 16")),
    }
}

pub fn parse_size(s: &str) -> Result<(usize, usize), String> {
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
    pub fn spec(&self) -> Result<RecipeSpec, Error> {
        for (what, v) in [("stride", self.stride), ("dilation", self.dilation)] {
            if let Some((a, b)) = v {
                if a == 0 || b == 0 {
                    return Err(Error::Usage(format!("{what} is 0; it must be at least 1")));
                }
            }
        }
        let mut spec = match &self.recipe {
            Some(path) => read_recipe(path)?,
            None => {
                let bank = resolve_bank(self.bank.as_deref().unwrap_or_default())?;
                let pool = match self.pool {
                    Some(kind) => Some(Pool {
                        kind,
                        window: self.pool_window()?,
                    }),
                    None => None,
                };
                let (mode, why) = tapmap::stage::default_pad(&bank);
                let mut recipe = Recipe::single(bank, self.act, pool);
                if let Some(c) = recipe.first_conv_mut() {
                    c.options.pad = mode;
                }
                RecipeSpec {
                    input: ReadOptions::default(),
                    recipe,
                    pads: vec![why],
                }
            }
        };
        match spec.recipe.first_conv_mut() {
            Some(conv) => {
                if self.recipe.is_some() {
                    if let Some(b) = &self.bank {
                        conv.bank = resolve_bank(b)?;
                        // A default pad follows the bank that replaced the recipe's.
                        if spec.pads.first() != Some(&PadReason::Recipe) {
                            let (mode, why) = tapmap::stage::default_pad(&conv.bank);
                            conv.options.pad = mode;
                            if let Some(p) = spec.pads.first_mut() {
                                *p = why;
                            }
                        }
                    }
                }
                let o = &mut conv.options;
                o.op = self.op.or(o.op);
                if let Some(p) = self.pad {
                    o.pad = p;
                    if let Some(r) = spec.pads.first_mut() {
                        *r = PadReason::Flag;
                    }
                }
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
                return Err(Error::Usage(
                    "conv flags were given but the recipe has no conv stage".into(),
                ));
            }
            None => {}
        }
        self.input.apply_to(&mut spec.input);
        spec.validate()?;
        Ok(spec)
    }

    fn pool_window(&self) -> Result<PoolWindow, Error> {
        Ok(match self.pool_size.as_deref() {
            Some("global") => PoolWindow::Global,
            other => {
                let size = parse_pair(other.unwrap_or("2"))
                    .map_err(|e| Error::Usage(format!("--pool-size {e}")))?;
                let stride = self.pool_stride.unwrap_or(size);
                if size.0 == 0 || size.1 == 0 || stride.0 == 0 || stride.1 == 0 {
                    return Err(Error::Usage(
                        "pool size and stride must be at least 1".into(),
                    ));
                }
                PoolWindow::Sized { size, stride }
            }
        })
    }
}

/// Threads to use (`--jobs`, default all cores).
/// `--jobs`, or one per core; a number above [`tapmap::jobs::max_jobs`] is
/// lowered to it with a warning.
pub fn thread_count(jobs: Option<u32>) -> usize {
    let most = tapmap::jobs::max_jobs();
    match jobs {
        None => std::thread::available_parallelism().map_or(1, |n| n.get()),
        Some(j) if j as usize > most => {
            tell!(
                "tapmap: warning: --jobs {j} is more than {} per core; running {most}",
                tapmap::jobs::MAX_JOBS_PER_CORE
            );
            most
        }
        Some(j) => j as usize,
    }
}
