//! The conv engine: what a conv stage computes, and the strategies that compute it.
//!
//! A [`ConvStage`] is plain data saying *what*: a bank, its op, pad mode, extent,
//! stride and dilation. Preparing it against an input shape checks the sizes
//! (with checked arithmetic, before anything is allocated) and turns the taps
//! into f32 in correlation order (rotated by 180° for `convolve`). A strategy
//! says *how*; the planner ([`choose_for`]) picks one, and every strategy must
//! give the reference's result to within f32 rounding. Prepared stages, the
//! strategies and their buffers are private to the crate: the public way in is
//! [`run_conv`] for one stage, or a [`crate::pipeline::Plan`] for a recipe.
//!
//! For output channel n, input channels c, taps t (after rotation for `convolve`)
//! and the padded input P:
//!
//! ```text
//! out[n][y][x] = scale_n · Σ_c Σ_u Σ_v t_n[c][u][v] · P_c[y·s_y + u·d_y][x·s_x + v·d_x] + bias_n
//! ```

pub(crate) mod bands;
pub(crate) mod buffers;
mod direct;
mod fft;
pub(crate) mod fused;
mod matmul;
mod planner;
pub(crate) mod prepared;
mod reference;
mod separable;
pub(crate) mod simd;

use std::fmt;
use std::str::FromStr;

use ndarray::{Array3, ArrayView3};

use crate::border::PadMode;
use crate::engine::buffers::Buffers;
use crate::engine::prepared::PreparedStage;
use crate::error::Error;
use crate::geometry::Extent;
use crate::kernel::{Bank, Op};

pub(crate) use planner::choose;
pub use planner::{FFT_FROM, MATMUL_FROM, MATMUL_MIN_KERNELS, SEPARABLE_FROM};

/// The options of a conv stage other than its bank.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConvOptions {
    /// Override of the bank's op; `None` keeps what the bank declares.
    pub op: Option<Op>,
    /// What stands outside the image.
    pub pad: PadMode,
    /// How much padding.
    pub extent: Extent,
    /// Stride (rows, columns).
    pub stride: (usize, usize),
    /// Dilation (rows, columns).
    pub dilation: (usize, usize),
}

impl Default for ConvOptions {
    fn default() -> Self {
        ConvOptions {
            op: None,
            pad: PadMode::Zero,
            extent: Extent::Same,
            stride: (1, 1),
            dilation: (1, 1),
        }
    }
}

/// One conv stage: a bank and how it slides.
#[derive(Debug, Clone, PartialEq)]
pub struct ConvStage {
    /// The kernels; kernel n makes output channel n.
    pub bank: Bank,
    /// Pad, extent, stride, dilation, op.
    pub options: ConvOptions,
}

impl ConvStage {
    /// The op in force: the override, else the bank's.
    pub fn op(&self) -> Op {
        self.options.op.unwrap_or(self.bank.op)
    }
}

/// Which strategy runs a conv stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Engine {
    /// Let the planner choose.
    Auto,
    /// Per-pixel sums with a border lookup per tap; slow, obviously right.
    Reference,
    /// Padded rows, whole-row multiply-adds per tap.
    Direct,
    /// Rank-1 kernels as a horizontal then a vertical 1-D pass.
    Separable,
    /// Image-to-columns in row bands and a matrix product per band.
    Matmul,
    /// Products of discrete Fourier transforms, for large kernels.
    Fft,
}

impl Engine {
    /// Name on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Engine::Auto => "auto",
            Engine::Reference => "reference",
            Engine::Direct => "direct",
            Engine::Separable => "separable",
            Engine::Matmul => "matmul",
            Engine::Fft => "fft",
        }
    }
}

impl fmt::Display for Engine {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Engine {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "auto" => Ok(Engine::Auto),
            "reference" => Ok(Engine::Reference),
            "direct" => Ok(Engine::Direct),
            "separable" => Ok(Engine::Separable),
            "matmul" => Ok(Engine::Matmul),
            "fft" => Ok(Engine::Fft),
            other => Err(format!(
                "unknown engine '{other}'; expected auto, reference, direct, separable, matmul or fft"
            )),
        }
    }
}

/// The planner's decision for one stage.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Choice {
    /// The strategy that will run.
    pub engine: Engine,
    /// Why, in a few words.
    pub reason: String,
}

/// A way to compute a prepared conv stage. Implementations may assume what
/// [`run_strategy`] checks: `input` holds `channels × height × width` samples
/// and `out` exactly `kernels × out_height × out_width`, every one of which they
/// overwrite.
trait Strategy: Sync {
    /// Computes the stage into `out`, taking scratch from `bufs`.
    fn run(&self, stage: &PreparedStage, input: &[f32], out: &mut [f32], bufs: &Buffers);
}

fn strategy(engine: Engine) -> &'static dyn Strategy {
    match engine {
        Engine::Reference => &reference::Reference,
        Engine::Separable => &separable::Separable,
        Engine::Matmul => &matmul::Matmul,
        Engine::Fft => &fft::Fft,
        Engine::Direct | Engine::Auto => &direct::Direct,
    }
}

/// Runs the strategy `engine` (already chosen) on a prepared stage, after
/// checking the lengths every strategy relies on.
///
/// # Panics
/// When `input` or `out` has another length than the stage was prepared for
/// (a bug in the caller inside this crate; public callers cannot reach it).
pub(crate) fn run_strategy(
    engine: Engine,
    st: &PreparedStage,
    input: &[f32],
    out: &mut [f32],
    bufs: &Buffers,
) {
    assert_eq!(
        input.len(),
        st.input_len(),
        "input of {} samples for a stage prepared for {}×{}×{}",
        input.len(),
        st.channels,
        st.height,
        st.width
    );
    assert_eq!(
        out.len(),
        st.kernels.len() * st.out_height * st.out_width,
        "output of {} samples for {} kernels of {}×{}",
        out.len(),
        st.kernels.len(),
        st.out_height,
        st.out_width
    );
    strategy(engine).run(st, input, out, bufs);
}

/// What the planner would choose for `stage` over an input of
/// `channels × height × width`, and why. Fails where the stage cannot run on
/// that input (the same checks as running it).
pub fn choose_for(
    stage: &ConvStage,
    (channels, height, width): (usize, usize, usize),
    engine: Engine,
) -> Result<Choice, Error> {
    Ok(choose(&stage.prepare(channels, height, width)?, engine))
}

/// Runs one conv stage over a `C × H × W` input with the chosen engine
/// (`Engine::Auto`: the planner's choice). The op, padding and output size are
/// the stage's ([`ConvOptions`]); the result is `kernels × out_height ×
/// out_width`. Fails, without computing anything, where the bank does not fit
/// the input's channels or sizes.
pub fn run_conv(
    stage: &ConvStage,
    input: &Array3<f32>,
    engine: Engine,
) -> Result<Array3<f32>, Error> {
    let (c, h, w) = input.dim();
    let prepared = stage.prepare(c, h, w)?;
    let chosen = choose(&prepared, engine).engine;
    run_prepared(&prepared, input.view(), chosen, &Buffers::new(0), 0)
}

/// Runs a prepared stage over `input`, which must have the prepared shape,
/// with the strategy `engine` the planner chose for it.
pub(crate) fn run_prepared(
    prepared: &PreparedStage,
    input: ArrayView3<f32>,
    engine: Engine,
    bufs: &Buffers,
    room: usize,
) -> Result<Array3<f32>, Error> {
    let (c, h, w) = input.dim();
    if (c, h, w) != (prepared.channels, prepared.height, prepared.width) {
        return Err(Error::shape(format!(
            "stage prepared for {}×{}×{} but given {c}×{h}×{w}",
            prepared.channels, prepared.height, prepared.width
        )));
    }
    let len = prepared.output_len()?;
    // Every strategy writes every output sample. `room` more samples of
    // capacity let a combine append its maps without a copy.
    let mut out = bufs.scratch(len + room);
    out.truncate(len);
    let standard = input.as_standard_layout();
    let data = standard.as_slice().expect("standard layout is contiguous");
    run_strategy(engine, prepared, data, &mut out, bufs);
    Ok(Array3::from_shape_vec(
        (
            prepared.kernels.len(),
            prepared.out_height,
            prepared.out_width,
        ),
        out,
    )
    .expect("the output was sized from the prepared shape"))
}
