//! A recipe: stages applied in order to a `C × H × W` input. Output channel
//! names come from the last conv stage's kernels.
//!
//! [`Recipe::plan`] walks the stages over an input size without touching pixels:
//! each stage's output size, padding, receptive field (r_out = r_in + (k_eff − 1)·j_in,
//! j_out = j_in·s; Dumoulin & Visin 2016), multiply-adds, the input rows and
//! columns the stride leaves unused at the far edge, and the engine choice.
//! Running uses the same checks, so a recipe that plans fails nowhere on size.

use ndarray::Array3;

use crate::engine::{choose, run_pooled, run_prepared, Choice, ConvStage, Engine};
use crate::error::Error;
use crate::geometry::ReceptiveField;
use crate::stage::{Activation, Pool};

/// One step of a recipe.
#[derive(Debug, Clone, PartialEq)]
pub enum Stage {
    /// A bank slid over the input.
    Conv(ConvStage),
    /// An element-wise activation.
    Act(Activation),
    /// Max or mean pooling.
    Pool(Pool),
}

/// Stages in order.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Recipe {
    /// The stages.
    pub stages: Vec<Stage>,
}

/// What one stage does to a given input size.
#[derive(Debug, Clone, PartialEq)]
pub struct StagePlan {
    /// `conv`, `act` or `pool`.
    pub kind: &'static str,
    /// One-line description of the stage.
    pub what: String,
    /// Input (channels, height, width).
    pub input: (usize, usize, usize),
    /// Output (channels, height, width).
    pub output: (usize, usize, usize),
    /// Padding (top, bottom, left, right), for conv stages.
    pub padding: Option<(usize, usize, usize, usize)>,
    /// Receptive field after this stage: (rows, cols).
    pub field: (ReceptiveField, ReceptiveField),
    /// Multiply-adds (conv), comparisons or additions (pool), or operations (act).
    pub operations: u128,
    /// Input rows and columns (not padding) at the far edge that no output sees.
    pub unused: (usize, usize),
    /// The engine choice, for conv stages.
    pub engine: Option<Choice>,
}

impl Recipe {
    /// Plans the recipe over an input of `channels × height × width`.
    pub fn plan(
        &self,
        channels: usize,
        height: usize,
        width: usize,
        engine: Engine,
    ) -> Result<Vec<StagePlan>, Error> {
        let mut shape = (channels, height, width);
        let mut field = (ReceptiveField::default(), ReceptiveField::default());
        let mut plans = Vec::with_capacity(self.stages.len());
        for (i, stage) in self.stages.iter().enumerate() {
            let ctx =
                |e: Error| Error::Stage(format!("stage {} ({}): {e}", i + 1, stage_kind(stage)));
            let plan = match stage {
                Stage::Conv(conv) => {
                    let p = conv.prepare(shape.0, shape.1, shape.2).map_err(ctx)?;
                    // The widest kernel sets the receptive field and the unused margin.
                    let widest = p.widest();
                    let (gr, gc) = (widest.geometry.rows, widest.geometry.cols);
                    let o = &conv.options;
                    let what = format!(
                        "bank {} ({} kernels), {}, pad {}, extent {}, stride {}, dilation {}",
                        conv.bank.name,
                        conv.bank.kernels.len(),
                        conv.op(),
                        o.pad,
                        o.extent,
                        pair(o.stride),
                        pair(o.dilation)
                    );
                    field = (
                        field.0.then(gr.effective_kernel(), gr.stride),
                        field.1.then(gc.effective_kernel(), gc.stride),
                    );
                    StagePlan {
                        kind: "conv",
                        what,
                        input: shape,
                        output: (p.kernels.len(), p.out_height, p.out_width),
                        padding: Some((gr.pad_before, gr.pad_after, gc.pad_before, gc.pad_after)),
                        field,
                        operations: p.multiply_adds(),
                        unused: (gr.unused_input(), gc.unused_input()),
                        engine: Some(choose(&p, engine)),
                    }
                }
                Stage::Act(a) => StagePlan {
                    kind: "act",
                    what: a.to_string(),
                    input: shape,
                    output: shape,
                    padding: None,
                    field,
                    operations: (shape.0 * shape.1 * shape.2) as u128,
                    unused: (0, 0),
                    engine: None,
                },
                Stage::Pool(pool) => {
                    let (oh, ow) = pool.output_size(shape.1, shape.2).map_err(ctx)?;
                    let ((kh, kw), (sh, sw)) = pool.window_over(shape.1, shape.2);
                    field = (field.0.then(kh, sh), field.1.then(kw, sw));
                    StagePlan {
                        kind: "pool",
                        what: pool.to_string(),
                        input: shape,
                        output: (shape.0, oh, ow),
                        padding: None,
                        field,
                        operations: (shape.0 * oh * ow * kh * kw) as u128,
                        unused: (
                            shape.1 - ((oh - 1) * sh + kh),
                            shape.2 - ((ow - 1) * sw + kw),
                        ),
                        engine: None,
                    }
                }
            };
            shape = plan.output;
            plans.push(plan);
        }
        Ok(plans)
    }

    /// Bytes of f32 samples held at the busiest point of a run over an input of
    /// `channels × height × width`: one stage's input, its padded copy and its
    /// output. Checked arithmetic throughout; an overflow is an error.
    pub fn peak_bytes(
        &self,
        channels: usize,
        height: usize,
        width: usize,
        engine: Engine,
    ) -> Result<u64, Error> {
        let too_big = || Error::Stage("the recipe's buffers for this input overflow".into());
        let count = |(c, h, w): (usize, usize, usize)| {
            (c as u64)
                .checked_mul(h as u64)
                .and_then(|v| v.checked_mul(w as u64))
        };
        let mut peak = 0u64;
        for p in self.plan(channels, height, width, engine)? {
            let padded = match p.padding {
                Some((t, b, l, r)) => count((p.input.0, p.input.1 + t + b, p.input.2 + l + r)),
                None => Some(0),
            };
            let bytes = [count(p.input), padded, count(p.output)]
                .into_iter()
                .try_fold(0u64, |acc, v| acc.checked_add(v?))
                .and_then(|v| v.checked_mul(4))
                .ok_or_else(too_big)?;
            peak = peak.max(bytes);
        }
        Ok(peak)
    }

    /// Runs every stage over `input` (`C × H × W`), returning the final maps.
    pub fn run(&self, input: Array3<f32>, engine: Engine) -> Result<Array3<f32>, Error> {
        self.run_with(input, engine, true)
    }

    /// [`Recipe::run`], with `fuse` false: every stage whole, one after another
    /// (what the fused path must equal bit for bit).
    pub fn run_with(
        &self,
        input: Array3<f32>,
        engine: Engine,
        fuse: bool,
    ) -> Result<Array3<f32>, Error> {
        let mut x = input;
        let mut skip = 0;
        for (i, stage) in self.stages.iter().enumerate() {
            if skip > 0 {
                skip -= 1;
                continue;
            }
            let ctx =
                |e: Error| Error::Stage(format!("stage {} ({}): {e}", i + 1, stage_kind(stage)));
            let y = match stage {
                Stage::Conv(conv) => {
                    let (c, h, w) = x.dim();
                    let p = conv.prepare(c, h, w).map_err(ctx)?;
                    if let Some(n) = &conv.bank.normalize {
                        n.apply(&mut x);
                    }
                    // conv → (act) → pool in bands when a pool follows.
                    let (act, pool) = match (self.stages.get(i + 1), self.stages.get(i + 2)) {
                        (Some(Stage::Pool(p)), _) => (None, Some((p, 1))),
                        (Some(Stage::Act(a)), Some(Stage::Pool(p))) => (Some(*a), Some((p, 2))),
                        _ => (None, None),
                    };
                    let fused = match pool {
                        Some((pool, n)) if fuse => {
                            // The pool's own size check first, so its errors read as
                            // they do unfused.
                            let pool_ctx =
                                |e: Error| Error::Stage(format!("stage {} (pool): {e}", i + 1 + n));
                            pool.output_size(p.out_height, p.out_width)
                                .map_err(pool_ctx)?;
                            run_pooled(&p, &x, engine, act, pool)
                                .map_err(ctx)?
                                .map(|y| (y, n))
                        }
                        _ => None,
                    };
                    match fused {
                        Some((y, n)) => {
                            skip = n;
                            y
                        }
                        None => run_prepared(&p, &x, engine).map_err(ctx)?,
                    }
                }
                Stage::Act(a) => {
                    if let Some(s) = x.as_slice_mut() {
                        a.apply(s);
                    } else {
                        x.mapv_inplace(|v| {
                            let mut t = [v];
                            a.apply(&mut t);
                            t[0]
                        });
                    }
                    continue;
                }
                Stage::Pool(p) => p.apply(&x).map_err(ctx)?,
            };
            // The stage's input is done with: its memory serves later buffers.
            crate::engine::recycle(std::mem::replace(&mut x, y));
        }
        Ok(x)
    }

    /// Names of the output channels: the last conv stage's kernel names, or
    /// `input` numbered when there is no conv stage.
    pub fn channel_names(&self, input_channels: usize) -> Vec<String> {
        self.stages
            .iter()
            .rev()
            .find_map(|s| match s {
                Stage::Conv(c) => Some(c.bank.kernels.iter().map(|k| k.name.clone()).collect()),
                _ => None,
            })
            .unwrap_or_else(|| (0..input_channels).map(|c| format!("input{c}")).collect())
    }
}

impl Recipe {
    /// Which output channels are ≥ 0 by construction, given which input channels
    /// are. A conv channel is when its scale and bias are ≥ 0 and every plane is
    /// either all ≥ 0 over a non-negative input channel or all zero; relu, abs,
    /// square and sigmoid make every channel non-negative; other activations and
    /// pooling keep what they are given.
    pub fn non_negative_channels(&self, mut nonneg: Vec<bool>) -> Vec<bool> {
        for stage in &self.stages {
            match stage {
                Stage::Conv(c) => {
                    if c.bank.normalize.is_some() {
                        nonneg.iter_mut().for_each(|v| *v = false);
                    }
                    let non_negative = |k: &crate::kernel::Kernel| {
                        k.scale >= 0.0
                            && k.bias >= 0.0
                            && k.planes.iter().enumerate().all(|(ch, p)| {
                                let input_ok = nonneg.get(ch).copied().unwrap_or(false);
                                if input_ok {
                                    p.iter().all(|t| *t >= 0.0)
                                } else {
                                    p.iter().all(|t| *t == 0.0)
                                }
                            })
                    };
                    nonneg = c.bank.kernels.iter().map(non_negative).collect();
                }
                Stage::Act(a) if a.non_negative() => nonneg.iter_mut().for_each(|v| *v = true),
                Stage::Act(_) | Stage::Pool(_) => {}
            }
        }
        nonneg
    }

    /// The recipe for `split` colour mode over channels named `channels`: the
    /// first conv stage's one-plane kernels become one kernel per channel, named
    /// `kernel@channel`, each reading only its channel.
    pub fn split_over(&self, channels: &[String]) -> Result<Recipe, Error> {
        let mut out = self.clone();
        let Some(Stage::Conv(conv)) = out.stages.iter_mut().find(|s| matches!(s, Stage::Conv(_)))
        else {
            return Ok(out);
        };
        if conv.bank.channels() != 1 {
            return Err(Error::Stage(format!(
                "colour mode split runs one-plane kernels over each channel, but bank '{}' has \
                 kernels with {} planes (use --color rgb for multi-plane kernels)",
                conv.bank.name,
                conv.bank.channels()
            )));
        }
        let n = channels.len();
        let mut kernels = Vec::with_capacity(conv.bank.kernels.len() * n);
        for k in &conv.bank.kernels {
            for (c, name) in channels.iter().enumerate() {
                let mut kc = k.clone();
                kc.name = format!("{}@{name}", k.name);
                kc.planes = (0..n)
                    .map(|i| {
                        if i == c {
                            k.planes[0].clone()
                        } else {
                            vec![0.0; k.rows * k.cols]
                        }
                    })
                    .collect();
                kc.origin = None;
                kernels.push(kc);
            }
        }
        conv.bank.kernels = kernels;
        Ok(out)
    }
}

fn stage_kind(s: &Stage) -> &'static str {
    match s {
        Stage::Conv(_) => "conv",
        Stage::Act(_) => "act",
        Stage::Pool(_) => "pool",
    }
}

/// `3` for (3, 3), `2,1` (rows, cols) otherwise.
fn pair((a, b): (usize, usize)) -> String {
    if a == b {
        a.to_string()
    } else {
        format!("{a},{b}")
    }
}
