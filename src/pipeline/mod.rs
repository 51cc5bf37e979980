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
use crate::stage::combine::{MapInfo, ResolvedCombine};
use crate::stage::{Activation, Pool, Recipe, RecipeSpec, Stage};
use contrast::Contrast;

pub mod combine;
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
        /// Planes of room left after the maps for a combine that keeps them.
        room: usize,
    },
    Act(Activation),
    Pool(Pool),
    Combine(Box<ResolvedCombine>),
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
    /// What is known of each output map (names, angles, cyclic ranges), for
    /// an input of signed samples and of non-negative ones.
    maps: [Vec<MapInfo>; 2],
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
        let inputs = |nonneg: bool| -> Vec<MapInfo> {
            (0..input.0)
                .map(|c| MapInfo::plain(format!("input{c}"), nonneg))
                .collect()
        };
        let maps = [recipe.maps(inputs(false))?, recipe.maps(inputs(true))?];
        // The maps before each stage, for combines that name them.
        let mut before = inputs(false);
        for (i, stage) in recipe.stages.iter().enumerate() {
            let ctx = |e: Error| e.within(&format!("stage {} ({})", i + 1, stage.kind()));
            let after = Recipe {
                stages: vec![stage.clone()],
            }
            .maps(before.clone())
            .map_err(ctx)?;
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
                        room: 0,
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
                Stage::Combine(_) | Stage::Thin(_) => {
                    let owned;
                    let c = match stage {
                        Stage::Combine(c) => c,
                        Stage::Thin(t) => {
                            owned = t.as_combine();
                            &owned
                        }
                        _ => unreachable!("matched above"),
                    };
                    let (r, _) = c.resolve(&before).map_err(ctx)?;
                    let out = (r.out_channels(), shape.1, shape.2);
                    let mut new_fields = if r.keep { fields.clone() } else { Vec::new() };
                    let mut work = fields.clone();
                    let mut what = Vec::new();
                    let mut operations = 0u128;
                    for (o, info) in r
                        .outputs
                        .iter()
                        .zip(&after[after.len() - r.outputs.len()..])
                    {
                        let f = o.sources.iter().fold(
                            (ReceptiveField::default(), ReceptiveField::default()),
                            |a, &s| (a.0.wider(work[s].0), a.1.wider(work[s].1)),
                        );
                        work.push(f);
                        new_fields.push(f);
                        let names: Vec<&str> = o
                            .sources
                            .iter()
                            .map(|&s| name_at(&before, &after, &r, s))
                            .collect();
                        what.push(format!(
                            "{} = {}({})",
                            info.name,
                            o.kind.label(),
                            names.join(", ")
                        ));
                        operations += (o.sources.len() * shape.1 * shape.2) as u128;
                    }
                    fields = new_fields;
                    peak = peak.max(stage_bytes(&[shape, out])?);
                    let row = StageSizes {
                        kind: stage.kind(),
                        what: format!(
                            "{}{}",
                            what.join("; "),
                            if r.keep {
                                "; sources kept"
                            } else {
                                "; sources dropped"
                            }
                        ),
                        input: shape,
                        output: out,
                        padding: None,
                        field: widest_of(&fields),
                        operations,
                        unused: (0, 0),
                        engine: None,
                    };
                    steps.push(Step::Combine(Box::new(r)));
                    row
                }
            };
            shape = row.output;
            sizes.push(row);
            before = after;
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
            maps,
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
        self.maps[0].iter().map(|m| m.name.clone()).collect()
    }

    /// Which output channels are ≥ 0 by construction, for an input whose
    /// samples are all ≥ 0 (`input_non_negative`) or may be signed.
    pub fn non_negative(&self, input_non_negative: bool) -> Vec<bool> {
        self.maps[usize::from(input_non_negative)]
            .iter()
            .map(|m| m.non_negative)
            .collect()
    }

    /// For each output channel, the range (lo, hi) of the cyclic value it
    /// holds (an orientation in degrees, lo and hi the same direction), if it holds one.
    pub fn cyclic(&self) -> Vec<Option<(f64, f64)>> {
        self.maps[0].iter().map(|m| m.cyclic).collect()
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
                    room,
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
                            let mut y = run_prepared(stage, x, *engine, bufs, 0)?;
                            c.apply(x, &mut y, bufs)?;
                            y
                        }
                        (None, None) => {
                            let plane = stage.out_height * stage.out_width;
                            run_prepared(stage, x, *engine, bufs, room * plane)?
                        }
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
                Step::Combine(r) => {
                    let (y, spent) = combine::run_combine(r, cur.take(), input, bufs);
                    if let Some(old) = spent {
                        self.give_back(old);
                    }
                    y
                }
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
/// stage suits banding; a conv step followed by a combine that keeps its maps
/// leaves room after them for the combine's outputs.
fn fuse_steps(steps: Vec<Step>) -> Vec<Step> {
    let mut out: Vec<Step> = Vec::with_capacity(steps.len());
    let mut it = steps.into_iter().peekable();
    while let Some(step) = it.next() {
        if let (
            Step::Conv {
                pool: None,
                contrast: None,
                ..
            },
            Some(Step::Combine(r)),
        ) = (&step, it.peek())
        {
            if r.keep {
                let n = r.outputs.len();
                let mut step = step;
                if let Step::Conv { room, .. } = &mut step {
                    *room = n;
                }
                out.push(step);
                continue;
            }
        }
        let Step::Conv {
            stage,
            engine,
            normalize,
            contrast: None,
            act: None,
            pool: None,
            room,
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
                    room,
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
                    room,
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

/// The name of source `s` of a combine: an input map, or an output before.
fn name_at<'a>(
    before: &'a [MapInfo],
    after: &'a [MapInfo],
    r: &ResolvedCombine,
    s: usize,
) -> &'a str {
    if s < r.inputs {
        &before[s].name
    } else {
        &after[after.len() - r.outputs.len() + (s - r.inputs)].name
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
