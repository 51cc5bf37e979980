//! `tapmap bank …`: the built-in kernels, bank files and imported weights.

use std::path::PathBuf;

use clap::Subcommand;

use tapmap::error::Error;
use tapmap::kernel::bankfile::bank_to_toml;
use tapmap::kernel::builtin::{bank_from_specs, resolve_bank};
use tapmap::kernel::import::Layout;
use tapmap::kernel::Op;

use super::args::{parse_floats, Floats};
use super::EXIT_OK;

#[derive(Subcommand)]
pub enum BankCommand {
    /// List the built-in kernel families with their parameters, and the shipped banks.
    List {
        /// Print JSON (schema shared/schemas/bank-list.schema.json) instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Print a bank's kernels: taps, sum, L1 norm, rank and factors, symmetry.
    #[command(
        after_help = "Examples:\n  tapmap bank show edges\n  tapmap bank show gaussian:sigma=1,radius=2\n  tapmap bank show my-bank.toml"
    )]
    Show {
        /// A bank file, a shipped bank, or shipped banks and families joined with '+'.
        #[arg(value_name = "NAME|FILE")]
        bank: String,
        /// Print JSON (schema shared/schemas/bank.schema.json) instead of text.
        #[arg(long)]
        json: bool,
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
        layout: Layout,
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
        /// Replace FILE if it exists.
        #[arg(long)]
        force: bool,
    },
    /// Draw a bank's taps as a sheet (PNG), one enlarged cell per kernel.
    #[command(
        after_help = "Examples:\n  tapmap bank draw edges -o edges.png\n  tapmap bank draw sample_data/learned/first-layer.safetensors -o learned.png"
    )]
    Draw {
        /// A bank file, weight file, shipped bank, or shipped banks and families joined with '+'.
        #[arg(value_name = "NAME|FILE")]
        bank: String,
        /// PNG to write.
        #[arg(long, short = 'o', value_name = "FILE")]
        out: PathBuf,
        /// Write each tap's value in its square (kernels up to 9×9 taps, one plane).
        #[arg(long)]
        values: bool,
    },
    /// Learn a bank from patches of the images: principal components or k-means.
    #[command(after_help = super::learn::AFTER_HELP)]
    Learn(Box<super::learn::LearnArgs>),
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
        /// Replace FILE if it exists.
        #[arg(long)]
        force: bool,
    },
}

pub fn run(cmd: BankCommand) -> Result<i32, Error> {
    match cmd {
        BankCommand::Learn(a) => super::learn::run(*a),
        BankCommand::Import {
            file,
            tensor,
            bias,
            layout,
            mean,
            std,
            op,
            out,
            force,
        } => {
            let opts = tapmap::kernel::import::ImportOptions {
                tensor,
                bias,
                layout,
                mean: mean.map(|f| f.0),
                std: std.map(|f| f.0),
                op: Some(op),
            };
            let bank = tapmap::kernel::import::import_bank(&file, &opts)?;
            let k = &bank.kernels[0];
            if layout == Layout::Hwio && k.rows != k.cols {
                tell!(
                    "tapmap: warning: {}: read as hwio (kh×kw×in×out) the kernels are {}×{}, not \
                     square; if the file is out×in×kh×kw (PyTorch's order), use --layout oihw",
                    file.display(),
                    k.rows,
                    k.cols
                );
            }
            tapmap::image_io::atomic::refuse_existing(&out, force)?;
            let text = bank_to_toml(&bank)?;
            tapmap::image_io::atomic::write_atomic(&out, |w| w.write_all(text.as_bytes()))?;
            let k = &bank.kernels[0];
            say!(
                "wrote {} ({} kernels of {}×{}×{}, op {}{})\n",
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
        BankCommand::Draw { bank, out, values } => {
            if !tapmap::jobs::inputs::has_extension(&out, "png") {
                return Err(Error::usage(format!(
                    "bank draw writes PNG; give -o a name ending in .png (not {})",
                    out.display()
                )));
            }
            let b = resolve_bank(&bank)?;
            let img = tapmap::render::taps::draw_bank_with(&b, values);
            tapmap::render::write_rgb(&out, &img)?;
            say!("wrote {} ({} kernels)\n", out.display(), b.kernels.len());
            Ok(EXIT_OK)
        }
        BankCommand::List { json } => {
            if json {
                say!("{:#}\n", tapmap::kernel::describe::family_list_json());
            } else {
                say!("{}", tapmap::kernel::describe::family_list());
            }
            Ok(EXIT_OK)
        }
        BankCommand::Show { bank, json } => {
            let bank = resolve_bank(&bank)?;
            if json {
                say!("{:#}\n", tapmap::kernel::describe::bank_json(&bank));
            } else {
                say!("{}", tapmap::kernel::describe::bank_details(&bank));
            }
            Ok(EXIT_OK)
        }
        BankCommand::Make {
            specs,
            out,
            name,
            op,
            force,
        } => {
            let name = name.unwrap_or_else(|| {
                out.file_stem()
                    .map_or_else(|| "bank".into(), |s| s.to_string_lossy().into_owned())
            });
            let bank = bank_from_specs(&specs, &name, op)?;
            tapmap::image_io::atomic::refuse_existing(&out, force)?;
            let text = bank_to_toml(&bank)?;
            tapmap::image_io::atomic::write_atomic(&out, |w| w.write_all(text.as_bytes()))?;
            say!("wrote {} ({} kernels)\n", out.display(), bank.kernels.len());
            Ok(EXIT_OK)
        }
    }
}
