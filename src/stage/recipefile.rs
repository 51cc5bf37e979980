//! Recipe files: our TOML schema for input handling and a list of stages.
//!
//! ```toml
//! [input]                       # optional
//! color = "luma"                # luma | rgb | split
//! white = 4095                  # white level of integer samples (default: full scale)
//! orientation = "apply"         # apply | ignore (EXIF orientation)
//!
//! [[stage]]                     # stages run in the order written
//! conv = "edges"                # a bank: shipped name, families joined by '+', or a
//!                               # .toml file (relative to this recipe's folder)
//! op = "correlate"              # optional: overrides the bank's op
//! pad = "reflect"               # zero | replicate | reflect | symmetric | wrap (default: see stage::pads)
//! extent = "same"               # valid | same | full (default same) …
//! # pad_width = 2               # … or explicit: N or [top, bottom, left, right]
//! stride = 1                    # N or [rows, cols]
//! dilation = 1                  # N or [rows, cols]
//!
//! [[stage]]
//! act = "leaky-relu"            # none | relu | leaky-relu | abs | square | tanh | sigmoid
//! slope = 0.1                   # leaky-relu only (default 0.01)
//!
//! [[stage]]
//! pool = "max"                  # max | mean
//! size = 2                      # N, [rows, cols] or "global"
//! stride = 2                    # default: the size
//!
//! [[stage]]
//! combine = "gradient"          # or a list: ["magnitude", "orientation"]; kinds:
//!                               # magnitude energy orientation max argmax sum mean
//!                               # weighted; sets: gradient gabor-energy (see stage::combine)
//! of = ["sobel-x", "sobel-y"]   # maps read, by name or index (default: all)
//! name = "edge-strength"        # one kind only (default: the kind's name)
//! keep = true                   # keep the maps read before the new ones (default true)
//! # weights = [0.5, 0.5]        # weighted only, one per map of `of`
//! # gives = "angle"             # argmax only: index (default) or angle
//!
//! [[stage]]
//! thin = "canny"                # thin edges: non-maximum suppression + hysteresis
//! low = 0.1                     # thresholds in gradient magnitude units
//! high = 0.3
//! # of = ["sobel-x", "sobel-y"] # the x/y pair (default: found by name)
//! ```
//!
//! Each `[[stage]]` has exactly one of `conv`, `act`, `pool`, `combine`, `thin`, and
//! only that kind's keys. Unknown keys are refused with their line and column.

use std::path::Path;

use serde::Deserialize;
use toml::Spanned;

use crate::border::PadMode;
use crate::engine::{ConvOptions, ConvStage};
use crate::error::Error;
use crate::geometry::{Extent, PadWidth};
use crate::image_io::ReadOptions;
use crate::kernel::bankfile::{line_col, toml_error};
use crate::kernel::builtin::resolve_bank;
use crate::kernel::Op;
use crate::stage::combine::Gives;
use crate::stage::{
    Activation, Combine, CombineItem, CombineKind, CombineWhat, MapRef, Pool, PoolKind, PoolWindow,
    Recipe, RecipeSpec, Stage, Thin,
};

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FileIn {
    input: Option<InputIn>,
    #[serde(default)]
    stage: Vec<Spanned<StageIn>>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct InputIn {
    color: Option<String>,
    white: Option<u32>,
    orientation: Option<String>,
}

#[derive(Deserialize, Clone, Copy)]
#[serde(untagged)]
enum OneOrTwo {
    One(usize),
    Two([usize; 2]),
}

impl OneOrTwo {
    fn pair(self) -> (usize, usize) {
        match self {
            OneOrTwo::One(v) => (v, v),
            OneOrTwo::Two([a, b]) => (a, b),
        }
    }
}

#[derive(Deserialize, Clone, Copy)]
#[serde(untagged)]
enum PadWidthIn {
    One(usize),
    Four([usize; 4]),
}

#[derive(Deserialize)]
#[serde(untagged)]
enum PoolSizeIn {
    Sized(OneOrTwo),
    Word(String),
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct StageIn {
    conv: Option<String>,
    op: Option<String>,
    pad: Option<String>,
    extent: Option<String>,
    pad_width: Option<PadWidthIn>,
    stride: Option<OneOrTwo>,
    dilation: Option<OneOrTwo>,
    act: Option<String>,
    slope: Option<f32>,
    pool: Option<String>,
    size: Option<PoolSizeIn>,
    combine: Option<OneOrMany>,
    of: Option<Vec<MapRefIn>>,
    name: Option<String>,
    keep: Option<bool>,
    weights: Option<Vec<f64>>,
    gives: Option<String>,
    thin: Option<String>,
    low: Option<f64>,
    high: Option<f64>,
}

#[derive(Deserialize)]
#[serde(untagged)]
enum OneOrMany {
    One(String),
    Many(Vec<String>),
}

#[derive(Deserialize)]
#[serde(untagged)]
enum MapRefIn {
    Index(usize),
    Name(String),
}

impl StageIn {
    /// The keys this table gives, by name.
    fn given(&self) -> Vec<&'static str> {
        let keys = [
            ("conv", self.conv.is_some()),
            ("op", self.op.is_some()),
            ("pad", self.pad.is_some()),
            ("extent", self.extent.is_some()),
            ("pad_width", self.pad_width.is_some()),
            ("stride", self.stride.is_some()),
            ("dilation", self.dilation.is_some()),
            ("act", self.act.is_some()),
            ("slope", self.slope.is_some()),
            ("pool", self.pool.is_some()),
            ("size", self.size.is_some()),
            ("combine", self.combine.is_some()),
            ("of", self.of.is_some()),
            ("name", self.name.is_some()),
            ("keep", self.keep.is_some()),
            ("weights", self.weights.is_some()),
            ("gives", self.gives.is_some()),
            ("thin", self.thin.is_some()),
            ("low", self.low.is_some()),
            ("high", self.high.is_some()),
        ];
        keys.iter().filter(|k| k.1).map(|k| k.0).collect()
    }

    /// Refuses keys outside `allowed` for a stage of `kind`.
    fn only(&self, kind: &str, allowed: &[&str]) -> Result<(), String> {
        let extra: Vec<&str> = self
            .given()
            .into_iter()
            .filter(|k| !allowed.contains(k))
            .collect();
        if extra.is_empty() {
            Ok(())
        } else {
            Err(format!(
                "a {kind} stage takes only {}; {} belong(s) to other stages",
                allowed.join(", "),
                extra.join(", ")
            ))
        }
    }

    fn map_refs(&self) -> Option<Vec<MapRef>> {
        self.of.as_ref().map(|v| {
            v.iter()
                .map(|r| match r {
                    MapRefIn::Index(i) => MapRef::Index(*i),
                    MapRefIn::Name(n) => MapRef::Name(n.clone()),
                })
                .collect()
        })
    }
}

/// A `[[stage]]` table with `combine = …`.
fn combine_stage(s: &StageIn) -> Result<Stage, String> {
    s.only(
        "combine",
        &["combine", "of", "name", "keep", "weights", "gives"],
    )?;
    let kinds = match s.combine.as_ref().expect("a combine stage") {
        OneOrMany::One(k) => vec![k.clone()],
        OneOrMany::Many(v) => v.clone(),
    };
    if kinds.is_empty() {
        return Err("combine = [] names no kind".into());
    }
    if kinds.len() > 1 && s.name.is_some() {
        return Err("name goes with one combine kind; give each its own stage to name them".into());
    }
    let mut items = Vec::with_capacity(kinds.len());
    for k in &kinds {
        let what = match (k.as_str(), &s.weights) {
            ("weighted", Some(w)) => CombineWhat::Kind(CombineKind::Weighted(w.clone())),
            ("weighted", None) => return Err("combine 'weighted' needs weights = [...]".into()),
            (_, Some(_)) => return Err("weights go with combine = \"weighted\"".into()),
            (other, None) => other.parse::<CombineWhat>()?,
        };
        let what = match (what, s.gives.as_deref()) {
            (CombineWhat::Kind(CombineKind::Argmax(_)), Some("angle")) => {
                CombineWhat::Kind(CombineKind::Argmax(Gives::Angle))
            }
            (w @ CombineWhat::Kind(CombineKind::Argmax(_)), None | Some("index")) => w,
            (CombineWhat::Kind(CombineKind::Argmax(_)), Some(g)) => {
                return Err(format!("gives '{g}': expected index or angle"))
            }
            (_, Some(_)) => return Err("gives goes with combine = \"argmax\"".into()),
            (w, None) => w,
        };
        items.push(CombineItem {
            what,
            of: s.map_refs(),
            name: s.name.clone(),
            channel: None,
        });
    }
    Ok(Stage::Combine(Combine {
        items,
        keep: s.keep.unwrap_or(true),
    }))
}

/// A `[[stage]]` table with `thin = "canny"`.
fn thin_stage(s: &StageIn) -> Result<Stage, String> {
    s.only("thin", &["thin", "of", "name", "keep", "low", "high"])?;
    match s.thin.as_deref() {
        Some("canny") => {}
        Some(o) => return Err(format!("thin '{o}': the one method is canny")),
        None => unreachable!("a thin stage"),
    }
    let (Some(low), Some(high)) = (s.low, s.high) else {
        return Err("a thin stage needs low and high thresholds (gradient magnitude units)".into());
    };
    Ok(Stage::Thin(Thin {
        of: s.map_refs(),
        low,
        high,
        name: s.name.clone(),
        keep: s.keep.unwrap_or(true),
    }))
}

/// Resolves a `conv = "…"` bank named in a recipe: a path relative to the
/// recipe's folder when it names a file there, else as `--bank` does.
pub fn resolve_bank_near(
    name: &str,
    recipe_dir: Option<&Path>,
) -> Result<crate::kernel::Bank, Error> {
    if let Some(dir) = recipe_dir {
        let p = dir.join(name);
        if p.is_file() || (name.ends_with(".toml") && !Path::new(name).is_absolute()) {
            return resolve_bank(&p.to_string_lossy());
        }
    }
    resolve_bank(name)
}

/// Parses a recipe; `origin` names the file in messages and locates relative banks.
pub fn parse_recipe(text: &str, origin: &Path) -> Result<RecipeSpec, Error> {
    let located = |at: Option<(usize, usize)>, message: String| Error::Recipe {
        file: Some(origin.to_path_buf()),
        at,
        message,
    };
    let err = |m: String| located(None, m);
    let file: FileIn = toml::from_str(text).map_err(|e| {
        let (place, message) = toml_error(text, &e);
        located(place, message)
    })?;
    let mut input = ReadOptions::default();
    if let Some(i) = file.input {
        if let Some(c) = i.color {
            input.color = c.parse().map_err(&err)?;
        }
        if let Some(w) = i.white {
            if w == 0 {
                return Err(err("[input] white must be at least 1".into()));
            }
            input.white = Some(w);
        }
        match i.orientation.as_deref() {
            None | Some("apply") => {}
            Some("ignore") => input.apply_orientation = false,
            Some(o) => {
                return Err(err(format!(
                    "[input] orientation '{o}': expected apply or ignore"
                )))
            }
        }
    }
    if file.stage.is_empty() {
        return Err(err(
            "no [[stage]] tables: a recipe needs at least one stage".into(),
        ));
    }
    let dir = origin.parent();
    let mut stages = Vec::with_capacity(file.stage.len());
    let mut pads = Vec::new();
    for (i, st) in file.stage.into_iter().enumerate() {
        let place = Some(line_col(text, st.span().start));
        let at = |m: String| located(place, format!("stage {}: {m}", i + 1));
        let s = st.into_inner();
        let kinds = [
            s.conv.is_some(),
            s.act.is_some(),
            s.pool.is_some(),
            s.combine.is_some(),
            s.thin.is_some(),
        ];
        if kinds.iter().filter(|k| **k).count() != 1 {
            return Err(at(
                "needs exactly one of conv, act, pool, combine or thin".into()
            ));
        }
        let stage = if s.combine.is_some() {
            combine_stage(&s).map_err(&at)?
        } else if s.thin.is_some() {
            thin_stage(&s).map_err(&at)?
        } else if let Some(bank) = &s.conv {
            s.only(
                "conv",
                &[
                    "conv",
                    "op",
                    "pad",
                    "extent",
                    "pad_width",
                    "stride",
                    "dilation",
                ],
            )
            .map_err(&at)?;
            if s.slope.is_some() || s.size.is_some() {
                return Err(at("slope and size belong to act and pool stages".into()));
            }
            let bank = resolve_bank_near(bank, dir).map_err(|e| at(e.to_string()))?;
            let mut o = ConvOptions::default();
            if let Some(op) = &s.op {
                o.op = Some(op.parse::<Op>().map_err(&at)?);
            }
            match &s.pad {
                Some(p) => {
                    o.pad = p.parse::<PadMode>().map_err(&at)?;
                    pads.push(crate::stage::PadReason::Recipe);
                }
                None => {
                    let (mode, why) = crate::stage::default_pad(&bank);
                    o.pad = mode;
                    pads.push(why);
                }
            }
            match (&s.extent, s.pad_width) {
                (Some(_), Some(_)) => return Err(at("give extent or pad_width, not both".into())),
                (Some(e), None) => o.extent = e.parse::<Extent>().map_err(&at)?,
                (None, Some(PadWidthIn::One(n))) => {
                    o.extent = Extent::Explicit(PadWidth {
                        top: n,
                        bottom: n,
                        left: n,
                        right: n,
                    })
                }
                (None, Some(PadWidthIn::Four([t, b, l, r]))) => {
                    o.extent = Extent::Explicit(PadWidth {
                        top: t,
                        bottom: b,
                        left: l,
                        right: r,
                    })
                }
                (None, None) => {}
            }
            o.stride = s.stride.map_or((1, 1), OneOrTwo::pair);
            o.dilation = s.dilation.map_or((1, 1), OneOrTwo::pair);
            for (what, (a, b)) in [("stride", o.stride), ("dilation", o.dilation)] {
                if a == 0 || b == 0 {
                    return Err(at(format!("{what} is 0; it must be at least 1")));
                }
            }
            Stage::Conv(ConvStage { bank, options: o })
        } else if let Some(a) = &s.act {
            if s.op.is_some()
                || s.pad.is_some()
                || s.extent.is_some()
                || s.pad_width.is_some()
                || s.stride.is_some()
                || s.dilation.is_some()
                || s.size.is_some()
            {
                return Err(at("an act stage takes only act and slope".into()));
            }
            let act = match (a.as_str(), s.slope) {
                ("leaky-relu", Some(slope)) if slope.is_finite() => Activation::LeakyRelu(slope),
                (_, Some(_)) => {
                    return Err(at(
                        "slope goes with act = \"leaky-relu\" and must be finite".into(),
                    ))
                }
                (name, None) => name.parse::<Activation>().map_err(&at)?,
            };
            s.only("act", &["act", "slope"]).map_err(&at)?;
            Stage::Act(act)
        } else {
            s.only("pool", &["pool", "size", "stride"]).map_err(&at)?;
            let kind: PoolKind = s.pool.as_deref().unwrap_or_default().parse().map_err(&at)?;
            if s.op.is_some()
                || s.pad.is_some()
                || s.extent.is_some()
                || s.pad_width.is_some()
                || s.dilation.is_some()
                || s.slope.is_some()
            {
                return Err(at("a pool stage takes only pool, size and stride".into()));
            }
            let window = match s.size {
                Some(PoolSizeIn::Word(w)) if w == "global" => {
                    if s.stride.is_some() {
                        return Err(at("a global pool has no stride".into()));
                    }
                    PoolWindow::Global
                }
                Some(PoolSizeIn::Word(w)) => {
                    return Err(at(format!(
                        "pool size '{w}': give N, [rows, cols] or \"global\""
                    )))
                }
                other => {
                    let size = other.map_or((2, 2), |s| match s {
                        PoolSizeIn::Sized(v) => v.pair(),
                        PoolSizeIn::Word(_) => (2, 2),
                    });
                    let stride = s.stride.map_or(size, OneOrTwo::pair);
                    if size.0 == 0 || size.1 == 0 || stride.0 == 0 || stride.1 == 0 {
                        return Err(at("pool size and stride must be at least 1".into()));
                    }
                    PoolWindow::Sized { size, stride }
                }
            };
            Stage::Pool(Pool { kind, window })
        };
        stages.push(stage);
    }
    Ok(RecipeSpec {
        input,
        recipe: Recipe { stages },
        pads,
    })
}

/// Reads a recipe file.
pub fn read_recipe(path: &Path) -> Result<RecipeSpec, Error> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    parse_recipe(&text, path)
}
