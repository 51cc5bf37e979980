//! A plan: a recipe made ready for one input shape, once, and reused for every
//! image of that shape (FFTW's plans, faer's scratch query).
//!
//! Making a [`Plan`] walks the stages over the shape without touching pixels:
//! every conv stage is checked and prepared (f32 taps, padding, output size),
//! the engine is chosen for it, conv → act → pool runs are marked for fusion,
//! and each stage's sizes, receptive field, cost and the stride's unused edge
//! are recorded ([`StageSizes`]). Running uses only what was checked here, so a
//! recipe that plans fails nowhere on size. The plan keeps the buffers that
//! runs reuse; hand finished maps back with [`Plan::give_back`].
//!
//! Receptive fields (Dumoulin & Visin 2016 §2) are tracked per output channel:
//! channels of the last conv stage follow their own kernel; earlier conv
//! stages count with their widest kernel, since every channel after them mixes
//! all of theirs.

use std::sync::{Arc, Mutex};

use ndarray::{Array3, ArrayView3};

use crate::engine::buffers::Buffers;
use crate::engine::fused::{fusable, run_pooled};
use crate::engine::prepared::PreparedStage;
use crate::engine::{choose, run_prepared, Engine};
use crate::error::Error;
use crate::geometry::ReceptiveField;
use crate::kernel::Normalize;
use crate::stage::{Activation, Pool, Recipe, RecipeSpec, Stage};
use contrast::Contrast;

mod contrast;
mod sizes;
pub use sizes::{sizes_json, sizes_table, StageSizes};

/// One step of a plan.
#[derive(Debug)]
enum Step {
    /// A prepared conv stage, its input normalisation, and the act and pool
    /// fused into it (the next `fused` stages of the recipe run inside it).
    Conv {
        stage: Box<PreparedStage>,
        /// The strategy the planner chose, once, when the plan was made.
        engine: Engine,
        normalize: Option<Normalize>,
        /// Patch contrast normalisation (learned banks); such a stage is never fused.
        contrast: Option<Box<Contrast>>,
        act: Option<Activation>,
        pool: Option<Pool>,
    },
    Act(Activation),
    Pool(Pool),
}

/// A recipe made ready for one input shape (see the module header).
#[derive(Debug)]
pub struct Plan {
    recipe: Recipe,
    input: (usize, usize, usize),
    output: (usize, usize, usize),
    steps: Vec<Step>,
    sizes: Vec<StageSizes>,
    fields: Vec<(ReceptiveField, ReceptiveField)>,
    peak: u64,
    buffers: Buffers,
}

/// Spare buffers a plan keeps between runs: enough for the maps of two images
/// in flight and each stage's scratch.
const SPARE_BUFFERS: usize = 8;

impl Plan {
    /// Plans `recipe` over inputs of `channels × height × width` with `engine`
    /// (`Engine::Auto`: the planner chooses per stage). Fails where a stage
    /// cannot run on that shape; the message says which stage and why.
    pub fn new(
        recipe: &Recipe,
        input: (usize, usize, usize),
        engine: Engine,
    ) -> Result<Plan, Error> {
        Plan::build(recipe, input, engine, true)
    }

    /// [`Plan::new`] that runs every stage whole, one after another, never
    /// fused: what the fused path must equal bit for bit.
    pub fn unfused(
        recipe: &Recipe,
        input: (usize, usize, usize),
        engine: Engine,
    ) -> Result<Plan, Error> {
        Plan::build(recipe, input, engine, false)
    }

    fn build(
        recipe: &Recipe,
        input: (usize, usize, usize),
        engine: Engine,
        fuse: bool,
    ) -> Result<Plan, Error> {
        let mut shape = input;
        let mut fields = vec![(ReceptiveField::default(), ReceptiveField::default()); input.0];
        let last_conv = recipe
            .stages
            .iter()
            .rposition(|s| matches!(s, Stage::Conv(_)));
        let mut steps = Vec::with_capacity(recipe.stages.len());
        let mut sizes = Vec::with_capacity(recipe.stages.len());
        let mut peak = 0u64;
        for (i, stage) in recipe.stages.iter().enumerate() {
            let ctx = |e: Error| e.within(&format!("stage {} ({})", i + 1, stage_kind(stage)));
            let row = match stage {
                Stage::Conv(conv) => {
                    let p = conv.prepare(shape.0, shape.1, shape.2).map_err(ctx)?;
                    let base = fields.iter().fold(
                        (ReceptiveField::default(), ReceptiveField::default()),
                        |a, f| (a.0.wider(f.0), a.1.wider(f.1)),
                    );
                    let through = |g: &crate::engine::prepared::Geometry| {
                        (
                            base.0.then(
                                g.rows.effective_kernel(),
                                g.rows.pad_before,
                                g.rows.stride,
                            ),
                            base.1.then(
                                g.cols.effective_kernel(),
                                g.cols.pad_before,
                                g.cols.stride,
                            ),
                        )
                    };
                    let widest = p.widest();
                    fields = if Some(i) == last_conv {
                        p.kernels.iter().map(|k| through(&k.geometry)).collect()
                    } else {
                        vec![through(&widest.geometry); p.kernels.len()]
                    };
                    let (gr, gc) = (widest.geometry.rows, widest.geometry.cols);
                    let o = &conv.options;
                    let what = format!(
                        "bank {} ({} kernels), {}, pad {}, extent {}, stride {}, dilation {}{}",
                        conv.bank.name,
                        conv.bank.kernels.len(),
                        conv.op(),
                        o.pad,
                        o.extent,
                        pair(o.stride),
                        pair(o.dilation),
                        conv.bank
                            .contrast
                            .map_or(String::new(), |e| format!(", window contrast ε {e:.3e}"))
                    );
                    let padded = (shape.0, gr.padded(), gc.padded());
                    let out = (p.kernels.len(), p.out_height, p.out_width);
                    let contrast = Contrast::of(conv, shape).map_err(ctx)?.map(Box::new);
                    let extra = contrast.as_ref().map_or(0, |c| c.extra_bytes());
                    peak = peak.max(
                        stage_bytes(&[shape, padded, out])?
                            .checked_add(extra)
                            .ok_or_else(|| {
                                Error::limit("the recipe's buffers for this input overflow")
                            })?,
                    );
                    let row = StageSizes {
                        kind: "conv",
                        what,
                        input: shape,
                        output: out,
                        padding: Some((gr.pad_before, gr.pad_after, gc.pad_before, gc.pad_after)),
                        field: widest_of(&fields),
                        operations: p.multiply_adds(),
                        unused: (gr.unused_input(), gc.unused_input()),
                        engine: Some(choose(&p, engine)),
                    };
                    let chosen = row.engine.as_ref().map_or(engine, |c| c.engine);
                    steps.push(Step::Conv {
                        stage: Box::new(p),
                        engine: chosen,
                        normalize: conv.bank.normalize.clone(),
                        contrast,
                        act: None,
                        pool: None,
                    });
                    row
                }
                Stage::Act(a) => {
                    steps.push(Step::Act(*a));
                    StageSizes {
                        kind: "act",
                        what: a.to_string(),
                        input: shape,
                        output: shape,
                        padding: None,
                        field: widest_of(&fields),
                        operations: (shape.0 * shape.1 * shape.2) as u128,
                        unused: (0, 0),
                        engine: None,
                    }
                }
                Stage::Pool(pool) => {
                    let (oh, ow) = pool.output_size(shape.1, shape.2).map_err(ctx)?;
                    let ((kh, kw), (sh, sw)) = pool.window_over(shape.1, shape.2);
                    for f in &mut fields {
                        *f = (f.0.then(kh, 0, sh), f.1.then(kw, 0, sw));
                    }
                    let out = (shape.0, oh, ow);
                    peak = peak.max(stage_bytes(&[shape, out])?);
                    steps.push(Step::Pool(*pool));
                    StageSizes {
                        kind: "pool",
                        what: pool.to_string(),
                        input: shape,
                        output: out,
                        padding: None,
                        field: widest_of(&fields),
                        operations: (shape.0 * oh * ow * kh * kw) as u128,
                        unused: (
                            shape.1 - ((oh - 1) * sh + kh),
                            shape.2 - ((ow - 1) * sw + kw),
                        ),
                        engine: None,
                    }
                }
            };
            shape = row.output;
            sizes.push(row);
        }
        if fuse {
            steps = fuse_steps(steps);
        }
        Ok(Plan {
            recipe: recipe.clone(),
            input,
            output: shape,
            steps,
            sizes,
            fields,
            peak,
            buffers: Buffers::new(SPARE_BUFFERS),
        })
    }

    /// The input shape (channels, height, width) this plan runs on.
    pub fn input_shape(&self) -> (usize, usize, usize) {
        self.input
    }

    /// The shape (channels, height, width) of the maps a run gives.
    pub fn output_shape(&self) -> (usize, usize, usize) {
        self.output
    }

    /// Each stage's sizes, padding, receptive field, cost and engine.
    pub fn sizes(&self) -> &[StageSizes] {
        &self.sizes
    }

    /// Receptive field (rows, cols) of each output channel over the input.
    pub fn fields(&self) -> &[(ReceptiveField, ReceptiveField)] {
        &self.fields
    }

    /// The widest receptive field (rows, cols) over the output channels.
    pub fn field(&self) -> (ReceptiveField, ReceptiveField) {
        widest_of(&self.fields)
    }

    /// Names of the output channels (see [`Recipe::channel_names`]).
    pub fn channel_names(&self) -> Vec<String> {
        self.recipe.channel_names(self.input.0)
    }

    /// Which output channels are ≥ 0 by construction, for an input whose
    /// samples are all ≥ 0 (`input_non_negative`) or may be signed.
    pub fn non_negative(&self, input_non_negative: bool) -> Vec<bool> {
        self.recipe
            .non_negative_channels(vec![input_non_negative; self.input.0])
    }

    /// Bytes of f32 samples held at the busiest point of a run: one stage's
    /// input, its padded copy and its output (checked arithmetic).
    pub fn peak_bytes(&self) -> u64 {
        self.peak
    }

    /// How many conv stages run fused with the act and pool after them (in
    /// bands, the conv map never held whole).
    pub fn fused(&self) -> usize {
        self.steps
            .iter()
            .filter(|s| matches!(s, Step::Conv { pool: Some(_), .. }))
            .count()
    }

    /// The recipe this plan was made from.
    pub fn recipe(&self) -> &Recipe {
        &self.recipe
    }

    /// Runs the recipe over `input`, which must have the planned shape; returns
    /// the final maps. The input is only read.
    pub fn run(&self, input: ArrayView3<f32>) -> Result<Array3<f32>, Error> {
        if input.dim() != self.input {
            let (c, h, w) = input.dim();
            return Err(Error::shape(format!(
                "plan made for {}×{}×{} inputs but given {c}×{h}×{w}",
                self.input.0, self.input.1, self.input.2
            )));
        }
        let bufs = &self.buffers;
        // The current maps: `None` while they are still the caller's input.
        let mut cur: Option<Array3<f32>> = None;
        for step in &self.steps {
            let next = match step {
                Step::Conv {
                    stage,
                    engine,
                    normalize,
                    contrast,
                    act,
                    pool,
                } => {
                    let normalized = match normalize {
                        Some(n) => {
                            let x = cur.as_ref().map_or(input, |a| a.view());
                            let mut v = bufs.scratch(x.len());
                            v.iter_mut().zip(x.iter()).for_each(|(d, s)| *d = *s);
                            let mut a =
                                Array3::from_shape_vec(x.dim(), v).expect("sized from the input");
                            n.apply(&mut a);
                            Some(a)
                        }
                        None => None,
                    };
                    let x = normalized
                        .as_ref()
                        .or(cur.as_ref())
                        .map_or(input, |a| a.view());
                    let y = match (pool, contrast) {
                        (Some(p), _) => run_pooled(stage, x, *engine, *act, p, bufs)?,
                        (None, Some(c)) => {
                            let mut y = run_prepared(stage, x, *engine, bufs)?;
                            c.apply(x, &mut y, bufs)?;
                            y
                        }
                        (None, None) => run_prepared(stage, x, *engine, bufs)?,
                    };
                    if let Some(a) = normalized {
                        self.give_back(a);
                    }
                    y
                }
                Step::Act(a) => {
                    let mut y = cur.take().unwrap_or_else(|| self.copy_of(input));
                    match y.as_slice_mut() {
                        Some(s) => a.apply(s),
                        None => y.mapv_inplace(|v| {
                            let mut t = [v];
                            a.apply(&mut t);
                            t[0]
                        }),
                    }
                    y
                }
                Step::Pool(p) => p.apply_in(cur.as_ref().map_or(input, |a| a.view()), bufs)?,
            };
            // The stage's input is done with: its memory serves later buffers.
            if let Some(old) = cur.replace(next) {
                self.give_back(old);
            }
        }
        Ok(cur.unwrap_or_else(|| self.copy_of(input)))
    }

    /// Keeps a finished array's memory for the next run of this plan. Call it
    /// when maps have been written and are no longer needed.
    pub fn give_back(&self, maps: Array3<f32>) {
        let (v, offset) = maps.into_raw_vec_and_offset();
        if matches!(offset, None | Some(0)) {
            self.buffers.give(v);
        }
    }

    fn copy_of(&self, x: ArrayView3<f32>) -> Array3<f32> {
        let mut v = self.buffers.scratch(x.len());
        v.iter_mut().zip(x.iter()).for_each(|(d, s)| *d = *s);
        Array3::from_shape_vec(x.dim(), v).expect("sized from the input")
    }
}

/// Runs a recipe over one `C × H × W` input: a plan made and used once. For
/// many inputs of one shape, make a [`Plan`] and reuse it.
pub fn run_recipe(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    engine: Engine,
) -> Result<Array3<f32>, Error> {
    Plan::new(recipe, input.dim(), engine)?.run(input)
}

/// Plans of one recipe by input shape and channel names, the most recent few
/// kept, shared by a job's threads: a folder of one camera's captures makes one
/// plan and reuses it (and its buffers) for every image.
#[derive(Debug, Default)]
pub struct PlanCache {
    plans: Mutex<Vec<(PlanKey, Arc<Plan>)>>,
}

type PlanKey = (Vec<String>, (usize, usize, usize));

/// Plans kept at once.
const PLANS_KEPT: usize = 4;

impl PlanCache {
    /// The plan for images with these channel names and shape, made on first use.
    pub fn get(
        &self,
        spec: &RecipeSpec,
        names: &[String],
        shape: (usize, usize, usize),
        engine: Engine,
    ) -> Result<Arc<Plan>, Error> {
        let key = (names.to_vec(), shape);
        {
            let plans = self.plans.lock().unwrap_or_else(|e| e.into_inner());
            if let Some((_, p)) = plans.iter().find(|(k, _)| *k == key) {
                return Ok(Arc::clone(p));
            }
        }
        let recipe = spec.recipe_for(names)?;
        let plan = Arc::new(Plan::new(&recipe, shape, engine)?);
        let mut plans = self.plans.lock().unwrap_or_else(|e| e.into_inner());
        plans.push((key, Arc::clone(&plan)));
        if plans.len() > PLANS_KEPT {
            plans.remove(0);
        }
        Ok(plan)
    }
}

/// conv → pool and conv → act → pool become one fused conv step where the
/// stage suits banding.
fn fuse_steps(steps: Vec<Step>) -> Vec<Step> {
    let mut out: Vec<Step> = Vec::with_capacity(steps.len());
    let mut it = steps.into_iter().peekable();
    while let Some(step) = it.next() {
        let Step::Conv {
            stage,
            engine,
            normalize,
            contrast: None,
            act: None,
            pool: None,
        } = step
        else {
            out.push(step);
            continue;
        };
        let mut act = None;
        let mut rest: Vec<Step> = Vec::new();
        if let Some(Step::Act(a)) = it.peek() {
            act = Some(*a);
            rest.push(it.next().expect("peeked"));
        }
        match it.peek() {
            Some(Step::Pool(p)) if fusable(&stage, engine, p) => {
                let pool = Some(*p);
                it.next();
                out.push(Step::Conv {
                    stage,
                    engine,
                    normalize,
                    contrast: None,
                    act,
                    pool,
                });
            }
            _ => {
                out.push(Step::Conv {
                    stage,
                    engine,
                    normalize,
                    contrast: None,
                    act: None,
                    pool: None,
                });
                out.extend(rest);
            }
        }
    }
    out
}

/// Bytes of f32 samples in the given shapes together, checked.
fn stage_bytes(shapes: &[(usize, usize, usize)]) -> Result<u64, Error> {
    let too_big = || Error::limit("the recipe's buffers for this input overflow");
    shapes
        .iter()
        .try_fold(0u64, |acc, &(c, h, w)| {
            (c as u64)
                .checked_mul(h as u64)
                .and_then(|v| v.checked_mul(w as u64))
                .and_then(|v| acc.checked_add(v))
        })
        .and_then(|v| v.checked_mul(4))
        .ok_or_else(too_big)
}

fn widest_of(fields: &[(ReceptiveField, ReceptiveField)]) -> (ReceptiveField, ReceptiveField) {
    fields.iter().fold(
        (ReceptiveField::default(), ReceptiveField::default()),
        |a, f| (a.0.wider(f.0), a.1.wider(f.1)),
    )
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
