//! The conv engine: what a conv stage computes, and the strategies that compute it.
//!
//! A [`ConvStage`] is plain data saying *what*: a bank, its op, pad mode, extent,
//! stride and dilation. [`ConvStage::prepare`] checks it against an input size
//! (with checked arithmetic, before anything is allocated) and turns the taps into
//! f32 in correlation order (rotated by 180° for `convolve`). A [`Strategy`] says
//! *how*; [`choose`] picks one, and every strategy must give the reference's result
//! to within f32 rounding.
//!
//! For output channel n, input channels c, taps t (after rotation for `convolve`)
//! and the padded input P:
//!
//! ```text
//! out[n][y][x] = scale_n · Σ_c Σ_u Σ_v t_n[c][u][v] · P_c[y·s_y + u·d_y][x·s_x + v·d_x] + bias_n
//! ```

pub mod direct;
pub mod fft;
pub mod matmul;
pub mod reference;
pub mod separable;
pub mod simd;

use std::fmt;
use std::str::FromStr;

use ndarray::Array3;

use crate::border::PadMode;
use crate::error::Error;
use crate::geometry::{axis_geometry, Axis, AxisGeometry, Extent};
use crate::kernel::{Bank, Op};

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

/// Geometry of one kernel over one input size.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Geometry {
    /// Along the rows (height).
    pub rows: AxisGeometry,
    /// Along the columns (width).
    pub cols: AxisGeometry,
}

/// One kernel ready for a strategy: f32 taps in correlation order.
#[derive(Debug, Clone)]
pub struct PreparedKernel {
    /// Tap rows.
    pub rows: usize,
    /// Tap columns.
    pub cols: usize,
    /// `channels × rows × cols` taps, correlation order (already rotated for `convolve`).
    pub taps: Vec<f32>,
    /// Multiplies the sum.
    pub scale: f32,
    /// Added after scaling.
    pub bias: f32,
    /// Padding and output size for this kernel.
    pub geometry: Geometry,
    /// When every plane has rank ≤ 1: per plane, its (column, row) factors in
    /// correlation order, or `None` for an all-zero plane.
    pub factors: Option<Vec<Option<Factors>>>,
}

/// Column factor u (k_h taps) and row factor v (k_w taps) of a rank-1 plane, t = u·vᵀ.
pub type Factors = (Vec<f32>, Vec<f32>);

/// Factors of every plane (correlation order), if all are rank ≤ 1.
fn plane_factors(planes: &[Vec<f64>], rows: usize, cols: usize) -> Option<Vec<Option<Factors>>> {
    use crate::kernel::analysis::{numeric_rank, rank1_factors, RANK_TOL};
    planes
        .iter()
        .map(|p| {
            let scale = p.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            if scale == 0.0 {
                return Some(None);
            }
            if numeric_rank(p, rows, cols, RANK_TOL * scale) != 1 {
                return None;
            }
            let (u, v) = rank1_factors(p, rows, cols)?;
            Some(Some((
                u.iter().map(|x| *x as f32).collect(),
                v.iter().map(|x| *x as f32).collect(),
            )))
        })
        .collect()
}

/// Pads every input channel for one kernel's geometry into `out`
/// (`channels × padded height × padded width`), reusing its allocation.
pub(crate) fn pad_input(st: &PreparedStage, g: &Geometry, input: &[f32], out: &mut Vec<f32>) {
    let (h, w) = (st.height, st.width);
    let plane = g.rows.padded() * g.cols.padded();
    let total = st.channels * plane;
    if out.capacity() < total {
        *out = fresh_buffer(total);
    }
    // Every sample is overwritten below; reused memory keeps its old values
    // meanwhile, and only growth is zero-filled to make the memory valid.
    out.truncate(total);
    out.resize(total, 0.0);
    for (c, dst) in out.chunks_exact_mut(plane).enumerate() {
        crate::border::pad_plane_into(
            &input[c * h * w..(c + 1) * h * w],
            (h, w),
            st.pad,
            (g.rows.pad_before, g.rows.pad_after),
            (g.cols.pad_before, g.cols.pad_after),
            dst,
        );
    }
}

/// The stage's kernels grouped by padding (in order): kernels of one group read
/// the same padded rows, so a band of rows is padded once for all of them.
pub(crate) fn pad_groups(st: &PreparedStage) -> Vec<Vec<usize>> {
    let pads = |k: &PreparedKernel| {
        let (r, c) = (k.geometry.rows, k.geometry.cols);
        (r.pad_before, r.pad_after, c.pad_before, c.pad_after)
    };
    let mut groups: Vec<Vec<usize>> = Vec::new();
    for (n, k) in st.kernels.iter().enumerate() {
        match groups
            .iter_mut()
            .find(|g| pads(&st.kernels[g[0]]) == pads(k))
        {
            Some(g) => g.push(n),
            None => groups.push(vec![n]),
        }
    }
    groups
}

/// One band of output rows [o0, o1) of a pad group: the padded input rows it
/// reads, [p0, p0 + rows).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Band {
    /// First output row.
    pub o0: usize,
    /// One past the last output row.
    pub o1: usize,
    /// First padded input row read.
    pub p0: usize,
    /// Padded input rows read.
    pub rows: usize,
}

/// Bands of `per_band` output rows for the kernels of `group`, with the padded
/// rows each reads (the tallest dilated kernel of the group decides).
pub(crate) fn bands(st: &PreparedStage, group: &[usize], per_band: usize) -> Vec<Band> {
    let g = st.kernels[group[0]].geometry;
    let ekh = group
        .iter()
        .map(|&n| st.kernels[n].geometry.rows.effective_kernel())
        .max()
        .unwrap_or(1);
    let sy = g.rows.stride;
    (0..st.out_height)
        .step_by(per_band.max(1))
        .map(|o0| {
            let o1 = (o0 + per_band.max(1)).min(st.out_height);
            let p0 = o0 * sy;
            Band {
                o0,
                o1,
                p0,
                rows: (o1 - 1) * sy + ekh - p0,
            }
        })
        .collect()
}

/// Pads just the rows of `band` of every input channel, for the padding of
/// kernel `n`, into `rows` (`channels × band.rows × padded width`).
pub(crate) fn pad_band(
    st: &PreparedStage,
    n: usize,
    input: &[f32],
    band: Band,
    rows: &mut Vec<f32>,
) {
    let g = st.kernels[n].geometry;
    let pw = g.cols.padded();
    let plane = st.height * st.width;
    rows.clear();
    rows.resize(st.channels * band.rows * pw, 0.0);
    for (c, dst) in rows.chunks_exact_mut(band.rows * pw).enumerate() {
        crate::border::pad_rows_into(
            &input[c * plane..(c + 1) * plane],
            (st.height, st.width),
            st.pad,
            g.rows.pad_before,
            (g.cols.pad_before, g.cols.pad_after),
            band.p0..band.p0 + band.rows,
            dst,
        );
    }
}

/// Calls `body(state, group, band, rows, padded_width)` for every band of output
/// rows of every pad group (bands of `per_band(group)` rows, in parallel), with
/// `rows` holding just the padded input rows the band reads (`channels ×
/// band.rows × padded width`); `init` makes each task's own `state`. What the
/// direct and separable strategies share.
pub(crate) fn for_each_band<S>(
    st: &PreparedStage,
    input: &[f32],
    per_band: impl Fn(&[usize]) -> usize,
    init: impl Fn() -> S + Sync + Send,
    body: impl Fn(&mut S, &[usize], Band, &[f32], usize) + Sync + Send,
) {
    use rayon::prelude::*;
    for group in pad_groups(st) {
        let pw = st.kernels[group[0]].geometry.cols.padded();
        let group = &group;
        bands(st, group, per_band(group))
            .into_par_iter()
            .for_each_init(
                || (Vec::new(), init()),
                |(rows, state), band| {
                    pad_band(st, group[0], input, band, rows);
                    body(state, group, band, rows, pw);
                },
            );
    }
}

/// Row `oy` of kernel `n`'s output plane, written through `dst`.
///
/// # Safety
/// `dst` must point at an output of `kernels × out_height × out_width` samples,
/// and no other task may touch this row meanwhile.
pub(crate) unsafe fn out_row<'a>(
    dst: OutPtr,
    st: &PreparedStage,
    n: usize,
    oy: usize,
) -> &'a mut [f32] {
    let ow = st.out_width;
    unsafe { std::slice::from_raw_parts_mut(dst.at((n * st.out_height + oy) * ow), ow) }
}

/// A conv stage checked against an input shape.
#[derive(Debug, Clone)]
pub struct PreparedStage {
    /// Input channels.
    pub channels: usize,
    /// Input height.
    pub height: usize,
    /// Input width.
    pub width: usize,
    /// Output height (the same for every kernel).
    pub out_height: usize,
    /// Output width.
    pub out_width: usize,
    /// Pad mode.
    pub pad: PadMode,
    /// The op that was applied when preparing the taps.
    pub op: Op,
    /// The kernels.
    pub kernels: Vec<PreparedKernel>,
}

impl PreparedStage {
    /// Number of output values, checked.
    pub fn output_len(&self) -> Result<usize, Error> {
        self.kernels
            .len()
            .checked_mul(self.out_height)
            .and_then(|v| v.checked_mul(self.out_width))
            .ok_or_else(|| Error::Geometry("output size overflows".into()))
    }

    /// The kernel with the largest dilated footprint: it sets the stage's receptive
    /// field and margins.
    pub fn widest(&self) -> &PreparedKernel {
        self.kernels
            .iter()
            .max_by_key(|k| k.geometry.rows.effective_kernel() * k.geometry.cols.effective_kernel())
            .expect("a prepared stage has kernels")
    }

    /// Multiply-adds of the whole stage.
    pub fn multiply_adds(&self) -> u128 {
        let outs = (self.out_height * self.out_width) as u128;
        self.kernels
            .iter()
            .map(|k| outs * (self.channels * k.rows * k.cols) as u128)
            .sum()
    }
}

impl ConvStage {
    /// The op in force: the override, else the bank's.
    pub fn op(&self) -> Op {
        self.options.op.unwrap_or(self.bank.op)
    }

    /// The geometry of kernel `n` over an input of `height × width`.
    pub fn kernel_geometry(
        &self,
        n: usize,
        height: usize,
        width: usize,
    ) -> Result<Geometry, Error> {
        let k = &self.bank.kernels[n];
        let o = &self.options;
        let ctx =
            |e: Error| Error::Geometry(format!("kernel '{}' ({}×{}): {e}", k.name, k.rows, k.cols));
        Ok(Geometry {
            rows: axis_geometry(
                Axis::Rows,
                height,
                k.rows,
                o.stride.0,
                o.dilation.0,
                o.extent,
            )
            .map_err(ctx)?,
            cols: axis_geometry(
                Axis::Cols,
                width,
                k.cols,
                o.stride.1,
                o.dilation.1,
                o.extent,
            )
            .map_err(ctx)?,
        })
    }

    /// Checks the stage against an input of `channels × height × width` and prepares
    /// f32 taps. Fails on a channel mismatch, impossible geometry, or kernels whose
    /// output sizes differ.
    pub fn prepare(
        &self,
        channels: usize,
        height: usize,
        width: usize,
    ) -> Result<PreparedStage, Error> {
        self.bank.validate()?;
        if self.bank.channels() != channels {
            return Err(Error::Stage(format!(
                "bank '{}' has kernels with {} plane(s) but its input has {channels} channel(s)",
                self.bank.name,
                self.bank.channels()
            )));
        }
        let op = self.op();
        let mut kernels = Vec::with_capacity(self.bank.kernels.len());
        for (n, k) in self.bank.kernels.iter().enumerate() {
            let geometry = self.kernel_geometry(n, height, width)?;
            // The padded copy of the input is the largest scratch buffer; its size
            // is checked before anything is allocated.
            geometry
                .rows
                .padded()
                .checked_mul(geometry.cols.padded())
                .and_then(|v| v.checked_mul(channels))
                .filter(|v| *v <= isize::MAX as usize / std::mem::size_of::<f32>())
                .ok_or_else(|| {
                    Error::Geometry(format!(
                        "kernel '{}': the padded input ({channels} × {} × {}) is too large to hold",
                        k.name,
                        geometry.rows.padded(),
                        geometry.cols.padded()
                    ))
                })?;
            let planes: Vec<Vec<f64>> = (0..k.channels())
                .map(|c| match op {
                    Op::Correlate => k.planes[c].clone(),
                    Op::Convolve => k.rotated_plane(c),
                })
                .collect();
            kernels.push(PreparedKernel {
                rows: k.rows,
                cols: k.cols,
                taps: planes.iter().flatten().map(|v| *v as f32).collect(),
                scale: k.scale as f32,
                bias: k.bias as f32,
                geometry,
                factors: plane_factors(&planes, k.rows, k.cols),
            });
        }
        let g0 = kernels[0].geometry;
        if let Some((n, k)) = kernels.iter().enumerate().find(|(_, k)| {
            (k.geometry.rows.output, k.geometry.cols.output) != (g0.rows.output, g0.cols.output)
        }) {
            return Err(Error::Geometry(format!(
                "bank '{}': kernel '{}' gives {}×{} outputs but '{}' gives {}×{} under extent {}; \
                 use extent same, or kernels of one size",
                self.bank.name,
                self.bank.kernels[n].name,
                k.geometry.cols.output,
                k.geometry.rows.output,
                self.bank.kernels[0].name,
                g0.cols.output,
                g0.rows.output,
                self.options.extent
            )));
        }
        let st = PreparedStage {
            channels,
            height,
            width,
            out_height: g0.rows.output,
            out_width: g0.cols.output,
            pad: self.options.pad,
            op,
            kernels,
        };
        st.output_len()?;
        Ok(st)
    }
}

/// A raw pointer to a stage's output, for strategies whose parallel tasks write
/// disjoint sets of output samples that are not one contiguous slice each (a band
/// of rows in every kernel's plane, say). Each user states why its writes are
/// disjoint.
#[derive(Clone, Copy)]
pub(crate) struct OutPtr(pub(crate) *mut f32);
// SAFETY: users write disjoint samples from each task (see each strategy), so
// sharing the pointer between threads cannot produce overlapping writes.
unsafe impl Send for OutPtr {}
unsafe impl Sync for OutPtr {}

impl OutPtr {
    /// The pointer `offset` samples in. A method (not a field access) so that
    /// closures capture the whole `OutPtr`, which is `Send`.
    ///
    /// # Safety
    /// `offset` must lie inside the output.
    pub(crate) unsafe fn at(self, offset: usize) -> *mut f32 {
        unsafe { self.0.add(offset) }
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

/// A way to compute a prepared conv stage.
pub trait Strategy: Sync {
    /// Its name, as `--engine` takes it.
    fn name(&self) -> &'static str;
    /// Computes the stage. `input` is `channels × height × width` row-major;
    /// `out` has `kernels × out_height × out_width` entries and is overwritten.
    fn run(&self, stage: &PreparedStage, input: &[f32], out: &mut [f32]);
}

/// The planner's decision for one stage.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Choice {
    /// The strategy that will run.
    pub engine: Engine,
    /// Why, in a few words.
    pub reason: String,
}

/// Smallest kernel side from which the separable passes beat the direct strategy
/// (measured with `cargo bench --bench engine -- separable_threshold`, medians on
/// 1024²: 3×3 ran 1.54 ms direct against 1.96 ms separable, 5×5 2.49 against
/// 2.23, 7×7 3.56 against 2.29, 13×13 9.70 against 3.08).
pub const SEPARABLE_FROM: usize = 5;

/// Smallest product (kernels × input channels × taps per plane) from which the
/// matrix product beats the direct strategy. Measured with `cargo bench --bench
/// engine -- matmul_threshold` (medians, 2 cores): 8×1×3×3 (72) tied at 28 ms on
/// 1024², 16×1×3×3 (144) ran 54 ms direct against 41 ms matmul, 64×3×7×7 on 512²
/// 271 ms against 79 ms.
pub const MATMUL_FROM: usize = 128;

/// Fewest taps per output sample (kernel taps ÷ stride area) from which the FFT
/// strategy beats the others for kernels that are not rank 1. Measured with
/// `cargo bench --bench engine -- fft_threshold` (medians on 1024², 2 cores, one
/// of them busy): one kernel 11×11 ran 12.2 ms direct against 13.4 ms FFT, 13×13
/// 15.8 against 12.2, 21×21 34.6 against 14.3; a bank of 8 ran 11×11 61 ms
/// matmul against 70 ms FFT, 15×15 130 against 59.
pub const FFT_FROM: usize = 169;

/// Fewest kernels for the matrix product: with fewer, the product is close to a
/// matrix-vector one and the column copy is not repaid.
pub const MATMUL_MIN_KERNELS: usize = 8;

/// True when every kernel has the same size and padding (what `matmul` needs).
fn uniform(stage: &PreparedStage) -> bool {
    let k0 = &stage.kernels[0];
    stage
        .kernels
        .iter()
        .all(|k| (k.rows, k.cols, k.geometry) == (k0.rows, k0.cols, k0.geometry))
}

/// Picks the strategy for a stage; a forced engine is taken as asked (forcing a
/// strategy the bank does not suit falls back to `direct`, and says so).
pub fn choose(stage: &PreparedStage, requested: Engine) -> Choice {
    let all_separable = stage.kernels.iter().all(|k| k.factors.is_some());
    let smallest = stage
        .kernels
        .iter()
        .map(|k| k.rows.min(k.cols))
        .min()
        .unwrap_or(0);
    let work =
        stage.kernels.len() * stage.channels * stage.kernels.first().map_or(0, |k| k.rows * k.cols);
    let fallback = |why: &str| Choice {
        engine: Engine::Direct,
        reason: why.to_string(),
    };
    let separable_pays = all_separable && smallest >= SEPARABLE_FROM;
    let taps_per_output = stage
        .kernels
        .iter()
        .map(|k| k.rows * k.cols / (k.geometry.rows.stride * k.geometry.cols.stride).max(1))
        .min()
        .unwrap_or(0);
    match requested {
        Engine::Auto if !separable_pays && taps_per_output >= FFT_FROM => Choice {
            engine: Engine::Fft,
            reason: format!(
                "{taps_per_output} taps per output ≥ {FFT_FROM} and not rank 1: \
                 a product of transforms costs the same for any kernel size"
            ),
        },
        Engine::Auto
            if uniform(stage)
                && work >= MATMUL_FROM
                && stage.kernels.len() >= MATMUL_MIN_KERNELS
                && !(all_separable && smallest >= SEPARABLE_FROM) =>
        {
            Choice {
                engine: Engine::Matmul,
                reason: format!(
                    "{} kernels × {} channels × {} taps ≥ {MATMUL_FROM}: a matrix product pays",
                    stage.kernels.len(),
                    stage.channels,
                    work / stage.kernels.len().max(1) / stage.channels.max(1)
                ),
            }
        }
        Engine::Auto if all_separable && smallest >= SEPARABLE_FROM => Choice {
            engine: Engine::Separable,
            reason: format!("every kernel is rank 1 and at least {SEPARABLE_FROM} taps a side"),
        },
        Engine::Auto if all_separable => fallback(&format!(
            "rank-1 kernels under {SEPARABLE_FROM} taps a side run faster directly"
        )),
        Engine::Auto => fallback("small bank, kernels not all rank 1: direct row multiply-adds"),
        Engine::Separable if !all_separable => {
            fallback("separable forced, but some kernel is not rank 1")
        }
        Engine::Matmul if !uniform(stage) => {
            fallback("matmul forced, but the kernels differ in size or padding")
        }
        forced => Choice {
            engine: forced,
            reason: "forced by --engine".into(),
        },
    }
}

pub(crate) fn strategy(engine: Engine) -> &'static dyn Strategy {
    match engine {
        Engine::Reference => &reference::Reference,
        Engine::Separable => &separable::Separable,
        Engine::Matmul => &matmul::Matmul,
        Engine::Fft => &fft::Fft,
        Engine::Direct | Engine::Auto => &direct::Direct,
    }
}

/// A buffer of exactly `len` samples for a caller that overwrites every one of
/// them: reused memory keeps its old values (no pass to zero it), and only
/// growth is zero-filled.
pub(crate) fn scratch(len: usize) -> Vec<f32> {
    let mut v = fresh_buffer(len);
    v.truncate(len);
    v.resize(len, 0.0);
    v
}

/// A buffer with room for `len` samples (its length is whatever it held; clear
/// or truncate it): one this thread gave back with
/// [`give_back`] when one is large enough, else a new one backed by huge pages
/// where the system allows (see [`advise_huge_range`]). Memory already written
/// once is several times faster to write than fresh memory, so a batch reuses
/// the same few buffers image after image instead of allocating per image.
pub(crate) fn fresh_buffer(len: usize) -> Vec<f32> {
    if let Some(v) = SPARE.with(|s| {
        let mut s = s.borrow_mut();
        // The smallest spare that fits, so large ones stay for large requests.
        let best = s
            .iter()
            .enumerate()
            .filter(|(_, b)| b.capacity() >= len)
            .min_by_key(|(_, b)| b.capacity())
            .map(|(i, _)| i);
        best.map(|i| s.swap_remove(i))
    }) {
        return v;
    }
    let mut v = Vec::with_capacity(len);
    advise_huge_range(v.as_mut_ptr(), len);
    v
}

/// Spare buffers per thread, and the most kept.
const SPARE_SLOTS: usize = 4;
/// Buffers larger than this (in samples, 1 GiB) are not kept.
const SPARE_MAX: usize = 1 << 28;

thread_local! {
    static SPARE: std::cell::RefCell<Vec<Vec<f32>>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Keeps a buffer for this thread's next [`fresh_buffer`]; with all slots taken
/// the smallest buffer is let go.
pub(crate) fn give_back(v: Vec<f32>) {
    if v.capacity() == 0 || v.capacity() > SPARE_MAX {
        return;
    }
    SPARE.with(|s| {
        let mut s = s.borrow_mut();
        s.push(v);
        if s.len() > SPARE_SLOTS {
            let smallest = (0..s.len())
                .min_by_key(|&i| s[i].capacity())
                .expect("not empty");
            s.swap_remove(smallest);
        }
    });
}

/// Hands a finished array's memory back for reuse by this thread's next run
/// (see [`fresh_buffer`]). Call it when a map has been written and is no
/// longer needed.
pub fn recycle(a: Array3<f32>) {
    let (v, offset) = a.into_raw_vec_and_offset();
    if matches!(offset, None | Some(0)) {
        give_back(v);
    }
}

/// Asks Linux to back a large, not yet touched buffer with transparent huge
/// pages. The first write to fresh memory otherwise costs a page fault per 4 KiB,
/// which was measured to dominate a 3×3 bank over a large image (about 1 GB/s
/// against 5 GB/s with huge pages on this kind of machine). A hint only: errors
/// are ignored, and other systems do nothing.
/// `ptr` may point at a Vec's spare capacity (allocated, not yet written).
fn advise_huge_range(ptr: *mut f32, len: usize) {
    #[cfg(target_os = "linux")]
    {
        const HUGE: usize = 2 << 20;
        let start = ptr as usize;
        let end = start + len * std::mem::size_of::<f32>();
        let (a, b) = (start.next_multiple_of(HUGE), end / HUGE * HUGE);
        if b > a {
            // SAFETY: [a, b) lies inside the caller's allocation; MADV_HUGEPAGE
            // only changes how the kernel backs the pages, never their contents.
            unsafe {
                libc::madvise(a as *mut libc::c_void, b - a, libc::MADV_HUGEPAGE);
            }
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = (ptr, len);
}

/// Runs a conv stage over a `C × H × W` input with the chosen engine.
pub fn run_conv(
    stage: &ConvStage,
    input: &Array3<f32>,
    engine: Engine,
) -> Result<Array3<f32>, Error> {
    let (c, h, w) = input.dim();
    let prepared = stage.prepare(c, h, w)?;
    run_prepared(&prepared, input, engine)
}

/// Runs an already prepared stage (the input must have the prepared shape).
pub fn run_prepared(
    prepared: &PreparedStage,
    input: &Array3<f32>,
    engine: Engine,
) -> Result<Array3<f32>, Error> {
    let (c, h, w) = input.dim();
    if (c, h, w) != (prepared.channels, prepared.height, prepared.width) {
        return Err(Error::Stage(format!(
            "stage prepared for {}×{}×{} but given {c}×{h}×{w}",
            prepared.channels, prepared.height, prepared.width
        )));
    }
    let len = prepared.output_len()?;
    // Every strategy writes every output sample.
    let mut out = scratch(len);
    let choice = choose(prepared, engine);
    let contiguous;
    let data = match input.as_slice() {
        Some(s) => s,
        None => {
            contiguous = input.as_standard_layout().into_owned();
            contiguous
                .as_slice()
                .expect("standard layout is contiguous")
        }
    };
    strategy(choice.engine).run(prepared, data, &mut out);
    Array3::from_shape_vec(
        (
            prepared.kernels.len(),
            prepared.out_height,
            prepared.out_width,
        ),
        out,
    )
    .map_err(|e| Error::Stage(format!("output shape: {e}")))
}

/// Runs a prepared conv stage, then `act`, then a sized `pool`, in bands of
/// pooled rows, so that the conv map is never held whole: each band pads just
/// the input rows it reads and computes just the conv rows its pool windows cover (rows
/// shared by two bands' windows are computed by both). Every output sample is
/// computed exactly as the unfused path computes it, so the result is
/// bit-identical to `run_prepared`, then the activation, then the pool.
///
/// Returns `None` when the stage does not suit banding (kernels of different
/// padding, a global pool, or the FFT strategy, whose tiles are planned over the
/// whole image); the caller then runs the stages one by one.
pub fn run_pooled(
    prepared: &PreparedStage,
    input: &Array3<f32>,
    engine: Engine,
    act: Option<crate::stage::Activation>,
    pool: &crate::stage::Pool,
) -> Result<Option<Array3<f32>>, Error> {
    use crate::stage::PoolWindow;
    use rayon::prelude::*;
    let choice = choose(prepared, engine);
    let g = prepared.kernels[0].geometry;
    if choice.engine == Engine::Fft
        || matches!(pool.window, PoolWindow::Global)
        || prepared.kernels.iter().any(|k| k.geometry != g)
    {
        return Ok(None);
    }
    let (c, h, w) = input.dim();
    if (c, h, w) != (prepared.channels, prepared.height, prepared.width) {
        return Err(Error::Stage(format!(
            "stage prepared for {}×{}×{} but given {c}×{h}×{w}",
            prepared.channels, prepared.height, prepared.width
        )));
    }
    let (oh, ow) = (prepared.out_height, prepared.out_width);
    let (qh, qw) = pool.output_size(oh, ow)?;
    let ((kh, _), (sh, _)) = pool.window_over(oh, ow);
    let contiguous = input.as_standard_layout();
    let data = contiguous.as_slice().expect("standard layout");
    let pw = g.cols.padded();
    let ekh = g.rows.effective_kernel();
    let sy = g.rows.stride;
    let n = prepared.kernels.len();
    // About 32 conv rows a band: enough work per task, little recomputed overlap.
    let per_band = (32 / sh).max(1);
    let bands: Vec<(usize, usize)> = (0..qh)
        .step_by(per_band)
        .map(|q0| (q0, (q0 + per_band).min(qh)))
        .collect();
    // Every pooled sample is written by exactly one band.
    let mut out = scratch(n * qh * qw);
    let dst = OutPtr(out.as_mut_ptr());
    bands
        .par_iter()
        .try_for_each(|&(q0, q1)| -> Result<(), Error> {
            // Conv rows [r0, r1) feed pooled rows [q0, q1); padded rows [p0, p1) feed them.
            let (r0, r1) = (q0 * sh, (q1 - 1) * sh + kh);
            let (p0, p1) = (r0 * sy, (r1 - 1) * sy + ekh);
            let bh = p1 - p0;
            // Just the padded rows this band reads (no padded copy of the image).
            let mut band_in = fresh_buffer(c * bh * pw);
            let rows = Band {
                o0: r0,
                o1: r1,
                p0,
                rows: bh,
            };
            pad_band(prepared, 0, data, rows, &mut band_in);
            let mut band = prepared.clone();
            band.height = bh;
            band.width = pw;
            band.out_height = r1 - r0;
            for k in &mut band.kernels {
                k.geometry.rows.input = bh;
                k.geometry.rows.pad_before = 0;
                k.geometry.rows.pad_after = 0;
                k.geometry.rows.output = r1 - r0;
                k.geometry.cols.input = pw;
                k.geometry.cols.pad_before = 0;
                k.geometry.cols.pad_after = 0;
            }
            let mut conv = scratch(n * (r1 - r0) * ow);
            strategy(choice.engine).run(&band, &band_in, &mut conv);
            give_back(band_in);
            if let Some(a) = act {
                a.apply(&mut conv);
            }
            let conv = Array3::from_shape_vec((n, r1 - r0, ow), conv)
                .map_err(|e| Error::Stage(format!("band shape: {e}")))?;
            // Bands already run in parallel: the band's maps are pooled in turn.
            let pooled = pool.apply_with(&conv, false)?;
            recycle(conv);
            let part = pooled.as_slice().expect("a new array is contiguous");
            let rows = q1 - q0;
            for k in 0..n {
                // SAFETY: this band alone writes pooled rows [q0, q1) of every
                // map, which lie inside `out` (q1 ≤ qh).
                let to = unsafe {
                    std::slice::from_raw_parts_mut(dst.at((k * qh + q0) * qw), rows * qw)
                };
                to.copy_from_slice(&part[k * rows * qw..(k + 1) * rows * qw]);
            }
            recycle(pooled);
            Ok(())
        })?;
    Array3::from_shape_vec((n, qh, qw), out)
        .map(Some)
        .map_err(|e| Error::Stage(format!("output shape: {e}")))
}
