//! A recipe: stages applied in order to a `C × H × W` input, plain data saying
//! what is computed. Output channel names come from the last conv stage's
//! kernels. To run one, make a [`crate::pipeline::Plan`] for the input's shape.

use crate::engine::ConvStage;
use crate::error::Error;
use crate::image_io::{ColorMode, ReadOptions};
use crate::stage::combine::{Combine, MapInfo, MapRef, Thin};
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
    /// New maps made pixel by pixel from the maps before (magnitude, …).
    Combine(Combine),
    /// Thin edges from an x/y derivative pair (Canny).
    Thin(Thin),
}

impl Stage {
    /// The stage's kind, as recipe files name it.
    pub fn kind(&self) -> &'static str {
        match self {
            Stage::Conv(_) => "conv",
            Stage::Act(_) => "act",
            Stage::Pool(_) => "pool",
            Stage::Combine(_) => "combine",
            Stage::Thin(_) => "thin",
        }
    }
}

/// Stages in order.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Recipe {
    /// The stages.
    pub stages: Vec<Stage>,
}

impl Recipe {
    /// A recipe of one conv stage (the bank with default options), then the
    /// activation and the pool when given.
    pub fn single(
        bank: crate::kernel::Bank,
        act: Option<Activation>,
        pool: Option<Pool>,
    ) -> Recipe {
        let mut stages = vec![Stage::Conv(ConvStage {
            bank,
            options: crate::engine::ConvOptions::default(),
        })];
        stages.extend(act.filter(|a| *a != Activation::None).map(Stage::Act));
        stages.extend(pool.map(Stage::Pool));
        Recipe { stages }
    }

    /// The first conv stage, if there is one.
    pub fn first_conv_mut(&mut self) -> Option<&mut ConvStage> {
        self.stages.iter_mut().find_map(|s| match s {
            Stage::Conv(c) => Some(c),
            _ => None,
        })
    }

    /// Names of the output channels: the last conv stage's kernel names (and
    /// the maps combine stages add), or `input` numbered when there is no conv stage.
    pub fn channel_names(&self, input_channels: usize) -> Vec<String> {
        let maps = self.maps(plain_inputs(&vec![false; input_channels]));
        maps.map(|m| m.into_iter().map(|m| m.name).collect())
            .unwrap_or_else(|_| (0..input_channels).map(|c| format!("input{c}")).collect())
    }

    /// Which output channels are ≥ 0 by construction, given which input channels
    /// are (see [`Recipe::maps`]).
    pub fn non_negative_channels(&self, nonneg: Vec<bool>) -> Vec<bool> {
        let n = nonneg.len();
        match self.maps(plain_inputs(&nonneg)) {
            Ok(m) => m.into_iter().map(|m| m.non_negative).collect(),
            Err(_) => vec![false; n],
        }
    }

    /// Walks the stages over maps described by `input`: names, declared
    /// angles, sign and cyclic range of every map after each stage; fails where
    /// a combine or thin stage names maps that are not there.
    ///
    /// A conv channel is ≥ 0 when its scale and bias are ≥ 0 and every plane is
    /// either all ≥ 0 over a non-negative input channel or all zero; relu, abs,
    /// square and sigmoid make every channel non-negative; other activations and
    /// pooling keep what they are given; combines say per kind
    /// ([`crate::stage::combine`]).
    pub fn maps(&self, input: Vec<MapInfo>) -> Result<Vec<MapInfo>, Error> {
        let mut maps = input;
        for (i, stage) in self.stages.iter().enumerate() {
            let at = |e: Error| e.within(&format!("stage {} ({})", i + 1, stage.kind()));
            match stage {
                Stage::Conv(c) => {
                    let nonneg: Vec<bool> = maps.iter().map(|m| m.non_negative).collect();
                    let normalized = c.bank.normalize.is_some();
                    // (y − b)/s + b is below 0 for y < b(1 − s), whatever y's sign.
                    let contrast = c.bank.contrast.is_some();
                    let non_negative = |k: &crate::kernel::Kernel| {
                        k.scale >= 0.0
                            && k.bias >= 0.0
                            && (!contrast || k.bias == 0.0)
                            && k.planes.iter().enumerate().all(|(ch, p)| {
                                let input_ok =
                                    !normalized && nonneg.get(ch).copied().unwrap_or(false);
                                if input_ok {
                                    p.iter().all(|t| *t >= 0.0)
                                } else {
                                    p.iter().all(|t| *t == 0.0)
                                }
                            })
                    };
                    maps = c
                        .bank
                        .kernels
                        .iter()
                        .map(|k| MapInfo {
                            name: k.name.clone(),
                            angle: k.declared_angle(),
                            non_negative: non_negative(k),
                            cyclic: None,
                        })
                        .collect();
                }
                Stage::Act(a) => {
                    for m in &mut maps {
                        m.non_negative |= a.non_negative();
                        if *a != Activation::None {
                            m.cyclic = None;
                        }
                    }
                }
                Stage::Pool(_) => {}
                Stage::Combine(c) => maps = c.resolve(&maps).map_err(at)?.1,
                Stage::Thin(t) => maps = t.as_combine().resolve(&maps).map_err(at)?.1,
            }
        }
        Ok(maps)
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
            return Err(Error::recipe(format!(
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
        let per_channel: Vec<String> = conv.bank.kernels.iter().map(|k| k.name.clone()).collect();
        conv.bank.kernels = kernels;
        let first = out
            .stages
            .iter()
            .position(|s| matches!(s, Stage::Conv(_)))
            .expect("found above");
        for stage in out.stages.iter_mut().skip(first + 1) {
            match stage {
                Stage::Conv(_) => break,
                Stage::Combine(c) => *c = combine_per_channel(c, &per_channel, channels)?,
                Stage::Thin(_) => {
                    return Err(Error::recipe(
                        "colour mode split does not run a thin stage (it reads one x/y pair);                          use --color luma, or rgb with three-plane derivative kernels",
                    ))
                }
                Stage::Act(_) | Stage::Pool(_) => {}
            }
        }
        Ok(out)
    }
}

/// Input maps described only by their sign, named `input0`, `input1`, ….
fn plain_inputs(nonneg: &[bool]) -> Vec<MapInfo> {
    nonneg
        .iter()
        .enumerate()
        .map(|(c, &n)| MapInfo::plain(format!("input{c}"), n))
        .collect()
}

/// A combine stage after the first conv stage in colour mode split: every
/// entry once per channel, reading that channel's maps (`name@channel`), its
/// outputs named `name@channel`.
fn combine_per_channel(
    c: &Combine,
    kernels: &[String],
    channels: &[String],
) -> Result<Combine, Error> {
    let mut items = Vec::with_capacity(c.items.len() * channels.len());
    for ch in channels {
        for item in &c.items {
            let of = match &item.of {
                None => kernels
                    .iter()
                    .map(|k| MapRef::Name(format!("{k}@{ch}")))
                    .collect(),
                Some(refs) => refs
                    .iter()
                    .map(|r| match r {
                        MapRef::Name(n) => Ok(MapRef::Name(format!("{n}@{ch}"))),
                        MapRef::Index(i) => Err(Error::recipe(format!(
                            "in colour mode split a combine names its maps (index {i} was given),                              since each channel's maps are read apart"
                        ))),
                    })
                    .collect::<Result<Vec<_>, _>>()?,
            };
            let mut it = item.clone();
            it.of = Some(of);
            it.channel = Some(ch.clone());
            items.push(it);
        }
    }
    Ok(Combine {
        items,
        keep: c.keep,
    })
}

/// A recipe with its input handling: what a job runs.
#[derive(Debug, Clone, PartialEq)]
pub struct RecipeSpec {
    /// How images are read.
    pub input: ReadOptions,
    /// The stages.
    pub recipe: Recipe,
    /// Why each conv stage pads as it does, in stage order, where a recipe
    /// file or flags decided it (see [`crate::stage::pads`]); empty when the
    /// spec was built in code with its modes given.
    pub pads: Vec<crate::stage::PadReason>,
}

impl RecipeSpec {
    /// The one check of a recipe and its banks, made before any image is read,
    /// wherever the recipe came from (a file, flags, an embedding program):
    /// every bank is valid, the first conv stage's kernels take the channels
    /// the colour mode gives, and each later conv stage's kernels take the
    /// channels the stage before gives.
    pub fn validate(&self) -> Result<(), Error> {
        if let Some(w) = self.input.white {
            if !(1..=65535).contains(&w) {
                return Err(Error::recipe(format!(
                    "white level {w} fits no integer sample type read (8 or 16 bits): give 1 to \
                     65535"
                )));
            }
        }
        let mut channels: Option<usize> = None;
        let mut per_channel = false;
        for (i, stage) in self.recipe.stages.iter().enumerate() {
            let Stage::Conv(conv) = stage else { continue };
            let at = |e: Error| e.within(&format!("stage {} (conv)", i + 1));
            conv.bank.validate().map_err(at)?;
            let planes = conv.bank.channels();
            match channels {
                None => {
                    let want = self.input.color.bank_channels();
                    if planes != want {
                        let mode = match self.input.color {
                            ColorMode::Rgb => "rgb gives 3 channels (r, g, b)",
                            ColorMode::Luma => "luma gives 1 channel",
                            ColorMode::Split => "split runs one-plane kernels over each channel",
                        };
                        let hint = if planes == 3 { "; use --color rgb" } else { "" };
                        return Err(Error::recipe(format!(
                            "bank '{}' has kernels with {planes} plane(s) but colour mode {mode}{hint}",
                            conv.bank.name
                        )));
                    }
                }
                Some(c) if c != planes && !per_channel => {
                    return Err(at(Error::recipe(format!(
                        "bank '{}' has kernels with {planes} plane(s), but the stage before gives \
                         {c} map(s); a conv stage's kernels need one plane per map they read",
                        conv.bank.name
                    ))));
                }
                Some(c) if planes % c != 0 => {
                    // Split mode: the first stage gives c maps per input channel.
                    return Err(at(Error::recipe(format!(
                        "bank '{}' has kernels with {planes} plane(s), but in colour mode split \
                         the stage before gives {c} map(s) per input channel, so a multiple of \
                         {c} planes is needed",
                        conv.bank.name
                    ))));
                }
                Some(_) => {}
            }
            // Only the first stage's maps come once per input channel.
            per_channel = channels.is_none() && self.input.color == ColorMode::Split;
            channels = Some(conv.bank.kernels.len());
        }
        // Combine and thin stages name maps: walk the recipe over the channels
        // the colour mode gives a colour image (luma: one).
        let names: Vec<String> = match self.input.color {
            ColorMode::Luma => vec!["luma".into()],
            ColorMode::Rgb | ColorMode::Split => ["r", "g", "b"].map(String::from).to_vec(),
        };
        let recipe = self.recipe_for(&names)?;
        recipe.maps(plain_inputs(&vec![true; names.len()]))?;
        Ok(())
    }

    /// The recipe to run on an image with these channel names: in `split` colour
    /// mode the first conv stage's kernels are spread over the channels
    /// ([`Recipe::split_over`]), otherwise the recipe as it is.
    pub fn recipe_for(&self, channel_names: &[String]) -> Result<Recipe, Error> {
        match self.input.color {
            ColorMode::Split => self.recipe.split_over(channel_names),
            _ => Ok(self.recipe.clone()),
        }
    }
}
