//! A recipe: stages applied in order to a `C × H × W` input, plain data saying
//! what is computed. Output channel names come from the last conv stage's
//! kernels. To run one, make a [`crate::pipeline::Plan`] for the input's shape.

use crate::engine::ConvStage;
use crate::error::Error;
use crate::image_io::{ColorMode, ReadOptions};
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
                    // (y − b)/s + b is below 0 for y < b(1 − s), whatever y's sign.
                    let contrast = c.bank.contrast.is_some();
                    let non_negative = |k: &crate::kernel::Kernel| {
                        k.scale >= 0.0
                            && k.bias >= 0.0
                            && (!contrast || k.bias == 0.0)
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
        conv.bank.kernels = kernels;
        Ok(out)
    }
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
