//! The command line: parse flags, turn them into a checked recipe before any
//! image is read, call the library, map the outcome to an exit status
//! (0 all good, 1 some inputs failed, 2 usage or set-up error).

mod report;

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::apply::{run_apply, ApplyJob};
use crate::border::PadMode;
use crate::engine::{ConvOptions, ConvStage, Engine};
use crate::error::Error;
use crate::geometry::{Extent, PadWidth};
use crate::kernel::bankfile::bank_to_toml;
use crate::kernel::builtin::resolve_bank;
use crate::kernel::{Bank, FamilySpec, Op};
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
    /// Run a bank over images and write one .npy of float32 maps (C×H×W) per image.
    #[command(after_help = "Examples:\n  \
        tapmap apply --bank edges --out maps sample_data/*.png\n  \
        tapmap apply --bank gaussian:sigma=2 --pad reflect --stride 2 --out blur tile.tif\n  \
        tapmap apply --bank my-filters.toml --op correlate --act relu --pool max --pool-size 2 --out fm a.png b.png\n\n\
        Each input INPUT/<stem>.ext writes OUT/<stem>.npy, loadable with numpy.load.")]
    Apply(ApplyArgs),
    /// Print each stage's output size, padding, receptive field and cost for an input size.
    #[command(after_help = "Examples:\n  \
        tapmap plan --size 640x480 --bank edges\n  \
        tapmap plan --size 1024x1024 --bank blobs --extent valid --stride 2 --pool max --pool-size 2")]
    Plan(PlanArgs),
    /// Built-in kernels and bank files: list, show, make.
    #[command(subcommand)]
    Bank(BankCommand),
}

#[derive(Args, Clone)]
struct StageArgs {
    /// Bank: a bank file (.toml), a shipped bank (edges, gradients, smooth, blobs, texture),
    /// or kernel families joined with '+', e.g. sobel-x+sobel-y or gaussian:sigma=2.
    #[arg(long, short = 'b', value_name = "NAME|FILE")]
    bank: String,
    /// convolve (rotate taps 180°) or correlate (taps as written); default: as the bank declares.
    #[arg(long, value_name = "OP")]
    op: Option<Op>,
    /// What stands outside the image: zero, replicate, reflect, symmetric, wrap.
    #[arg(long, default_value = "zero", value_name = "MODE")]
    pad: PadMode,
    /// How much padding: valid (none), same (output = ceil(input/stride)), full (k−1 each side).
    #[arg(
        long,
        default_value = "same",
        conflicts_with = "pad_width",
        value_name = "EXTENT"
    )]
    extent: Extent,
    /// Explicit padding instead of --extent: N, or TOP,BOTTOM,LEFT,RIGHT.
    #[arg(long, value_name = "N|T,B,L,R")]
    pad_width: Option<PadWidth>,
    /// Stride: N, or ROWS,COLS.
    #[arg(long, default_value = "1", value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    stride: (usize, usize),
    /// Dilation: N, or ROWS,COLS.
    #[arg(long, default_value = "1", value_parser = parse_pair, value_name = "N|ROWS,COLS")]
    dilation: (usize, usize),
    /// Activation after the conv: none, relu, leaky-relu[:SLOPE], abs, square, tanh, sigmoid.
    #[arg(long, default_value = "none", value_name = "ACT")]
    act: Activation,
    /// Pooling after the activation: max or mean.
    #[arg(long, value_name = "KIND")]
    pool: Option<PoolKind>,
    /// Pool window: N, ROWS,COLS, or global (each map to one value). Default 2.
    #[arg(long, value_name = "N|ROWS,COLS|global", requires = "pool")]
    pool_size: Option<String>,
    /// Pool stride: N or ROWS,COLS. Default: the window size.
    #[arg(long, value_parser = parse_pair, value_name = "N|ROWS,COLS", requires = "pool")]
    pool_stride: Option<(usize, usize)>,
    /// Conv strategy: auto (the planner chooses), reference (slow, exact), direct.
    #[arg(long, default_value = "auto", value_name = "ENGINE")]
    engine: Engine,
}

#[derive(Args)]
struct ApplyArgs {
    #[command(flatten)]
    stage: StageArgs,
    /// Output folder (created if missing).
    #[arg(long, short = 'o', value_name = "DIR")]
    out: PathBuf,
    /// Print nothing but errors.
    #[arg(long, short = 'q')]
    quiet: bool,
    /// Image files (PNG, JPEG, TIFF; 8- or 16-bit; colour becomes BT.709 luma).
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
    /// Input channels.
    #[arg(long, default_value_t = 1, value_name = "N")]
    channels: usize,
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
    /// Turns the flags into a checked one-conv recipe (plus act and pool).
    fn recipe(&self) -> Result<Recipe, Error> {
        let bank = resolve_bank(&self.bank)?;
        let extent = self.pad_width.map_or(self.extent, Extent::Explicit);
        for (what, (a, b)) in [("stride", self.stride), ("dilation", self.dilation)] {
            if a == 0 || b == 0 {
                return Err(Error::Geometry(format!(
                    "{what} is 0; it must be at least 1"
                )));
            }
        }
        let options = ConvOptions {
            op: self.op,
            pad: self.pad,
            extent,
            stride: self.stride,
            dilation: self.dilation,
        };
        let mut stages = vec![Stage::Conv(ConvStage { bank, options })];
        if self.act != Activation::None {
            stages.push(Stage::Act(self.act));
        }
        if let Some(kind) = self.pool {
            let window = match self.pool_size.as_deref() {
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
            };
            stages.push(Stage::Pool(Pool { kind, window }));
        }
        Ok(Recipe { stages })
    }
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
            let recipe = p.stage.recipe()?;
            let (w, h) = p.size;
            let plans = recipe.plan(p.channels, h, w, p.stage.engine)?;
            print!("{}", report::plan_table((p.channels, h, w), &plans));
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
        name,
        op,
        description: None,
        kernels,
    };
    bank.validate()?;
    Ok(bank)
}

fn apply(a: ApplyArgs) -> Result<i32, Error> {
    let recipe = a.stage.recipe()?;
    let job = ApplyJob {
        recipe,
        engine: a.stage.engine,
        out_dir: a.out.clone(),
        inputs: a.inputs,
    };
    let quiet = a.quiet;
    let summary = run_apply(&job, |o| match &o.result {
        Ok(out) if !quiet => println!("{} -> {}", o.input.display(), out.display()),
        Ok(_) => {}
        Err(e) => eprintln!("tapmap: {e}"),
    })?;
    if !quiet || summary.failed > 0 {
        eprintln!(
            "tapmap: {} image(s) written to {}, {} failed",
            summary.written,
            a.out.display(),
            summary.failed
        );
    }
    Ok(if summary.failed > 0 {
        EXIT_SOME_FAILED
    } else {
        EXIT_OK
    })
}
