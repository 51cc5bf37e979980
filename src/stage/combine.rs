//! Combine stages: new maps made pixel by pixel from the maps before them
//! (gradient magnitude and orientation, oriented energy, the strongest of a
//! bank and which one it is, sums), and the thin-edge stage (Canny 1986).
//!
//! A combine stage holds one or more outputs, computed in order; each reads
//! maps of the stage's input by name or index (`of`; all of them when left
//! out), and may also read the outputs written before it in the same stage, by
//! name. The outputs come after the input maps (`keep = true`, the default) or
//! instead of them (`keep = false`).
//!
//! Conventions, stated once:
//! - `magnitude` = sqrt(Σ xᵢ²) and `energy` = Σ xᵢ² (sums in f64, rounded
//!   once to f32). Oriented energy of an even/odd quadrature pair is their
//!   `energy` (Adelson & Bergen, J. Opt. Soc. Am. A 2(2), 1985, §3).
//! - `orientation` of a pair (x, y) = atan2(y, x) in degrees, in (−180, 180]:
//!   0 points along +x (to the right, increasing column), +90 along +y
//!   (downwards, increasing row), so with the textbook Sobel pair it is the
//!   direction in which brightness rises, measured clockwise on screen.
//!   atan2(0, 0) = 0. Views draw it on a cyclic colour scale.
//! - `max` and `argmax` take the first largest value in `of` order; `argmax`
//!   gives its position in `of` (0, 1, …) or, with `gives = "angle"`, the
//!   declared angle of the kernel behind it (a bank file's `angle`, a Gabor
//!   kernel's `theta`).
//! - `sum`, `mean` and `weighted` (Σ wᵢ xᵢ, one weight per map of `of`) sum in f64.
//!
//! Built-in sets: `gradient` is `magnitude` and `orientation` over the first
//! x/y derivative pair found by name (`sobel-x` and `sobel-y`, `scharr-…`,
//! `prewitt-…`, or any `P-x`, `P-y`); `gabor-energy` is, for each angle among
//! the oriented kernels, the `energy` of its kernels (`energy-θ`: an even/odd
//! pair, or one kernel squared), then `strongest` (their `max`) and `angle`
//! (their `argmax` as an angle).

use std::fmt;

use crate::error::Error;
pub use crate::stage::maps::MapInfo;

/// A map named in `of`: by name or by 0-based index among the stage's input maps.
#[derive(Debug, Clone, PartialEq)]
pub enum MapRef {
    /// By name.
    Name(String),
    /// By index among the stage's input maps.
    Index(usize),
}

impl fmt::Display for MapRef {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            MapRef::Name(n) => f.write_str(n),
            MapRef::Index(i) => write!(f, "{i}"),
        }
    }
}

/// What `argmax` reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Gives {
    /// Position in `of`, from 0.
    Index,
    /// The declared angle of the map's kernel, in degrees.
    Angle,
}

/// How one output map is made from its sources.
#[derive(Debug, Clone, PartialEq)]
pub enum CombineKind {
    /// sqrt(Σ x²).
    Magnitude,
    /// Σ x².
    Energy,
    /// atan2(y, x) in degrees, of exactly two maps (x, y).
    Orientation,
    /// The largest.
    Max,
    /// Which one is largest.
    Argmax(Gives),
    /// Σ x.
    Sum,
    /// Σ x / n.
    Mean,
    /// Σ wᵢ xᵢ.
    Weighted(Vec<f64>),
    /// Thin edges of an x/y pair (see [`Thin`]): 1 on edges, 0 elsewhere.
    Thin {
        /// Lower hysteresis threshold.
        low: f64,
        /// Upper hysteresis threshold.
        high: f64,
    },
}

impl CombineKind {
    /// The kind with its parameters, for plans and messages.
    pub fn label(&self) -> String {
        match self {
            CombineKind::Weighted(w) => format!("weighted{w:?}"),
            CombineKind::Argmax(Gives::Angle) => "argmax-angle".into(),
            CombineKind::Thin { low, high } => format!("thin[hysteresis {low} to {high}]"),
            k => k.name().into(),
        }
    }

    /// The kind's name, also an output's default name.
    pub fn name(&self) -> &'static str {
        match self {
            CombineKind::Magnitude => "magnitude",
            CombineKind::Energy => "energy",
            CombineKind::Orientation => "orientation",
            CombineKind::Max => "max",
            CombineKind::Argmax(_) => "argmax",
            CombineKind::Sum => "sum",
            CombineKind::Mean => "mean",
            CombineKind::Weighted(_) => "weighted",
            CombineKind::Thin { .. } => "edges",
        }
    }
}

/// A built-in set of outputs (see the module header).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Preset {
    /// Magnitude and orientation of an x/y derivative pair.
    Gradient,
    /// Energy per angle, the strongest and its angle.
    GaborEnergy,
}

/// What one entry of a combine stage asks for.
#[derive(Debug, Clone, PartialEq)]
pub enum CombineWhat {
    /// One map of this kind.
    Kind(CombineKind),
    /// A built-in set of maps.
    Preset(Preset),
}

/// Every name `--combine` and `combine = "…"` take.
pub const KIND_NAMES: &[&str] = &[
    "magnitude",
    "energy",
    "orientation",
    "max",
    "argmax",
    "sum",
    "mean",
    "weighted",
    "gradient",
    "gabor-energy",
];

impl std::str::FromStr for CombineWhat {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        Ok(match s {
            "magnitude" => CombineWhat::Kind(CombineKind::Magnitude),
            "energy" => CombineWhat::Kind(CombineKind::Energy),
            "orientation" => CombineWhat::Kind(CombineKind::Orientation),
            "max" => CombineWhat::Kind(CombineKind::Max),
            "argmax" => CombineWhat::Kind(CombineKind::Argmax(Gives::Index)),
            "sum" => CombineWhat::Kind(CombineKind::Sum),
            "mean" => CombineWhat::Kind(CombineKind::Mean),
            "weighted" => {
                return Err("combine 'weighted' needs its weights: give it in a recipe \
                            with weights = [...]"
                    .into())
            }
            "gradient" => CombineWhat::Preset(Preset::Gradient),
            "gabor-energy" => CombineWhat::Preset(Preset::GaborEnergy),
            _ => {
                return Err(format!(
                    "combine '{s}': expected one of {}{}",
                    KIND_NAMES.join(", "),
                    crate::kernel::families::near_names_hint(s, KIND_NAMES.iter().copied())
                ))
            }
        })
    }
}

/// One entry of a combine stage.
#[derive(Debug, Clone, PartialEq)]
pub struct CombineItem {
    /// What it makes.
    pub what: CombineWhat,
    /// The maps it reads; `None`: all of the stage's input maps.
    pub of: Option<Vec<MapRef>>,
    /// The output's name (one-map kinds); default the kind's name.
    pub name: Option<String>,
    /// Colour mode split: the channel this entry runs for; every name it
    /// gives ends in `@channel`.
    pub channel: Option<String>,
}

impl CombineItem {
    /// An entry of `what` over all input maps, with its default name.
    pub fn of_all(what: CombineWhat) -> CombineItem {
        CombineItem {
            what,
            of: None,
            name: None,
            channel: None,
        }
    }
}

/// A combine stage: its entries in order, and whether the input maps stay.
#[derive(Debug, Clone, PartialEq)]
pub struct Combine {
    /// The entries.
    pub items: Vec<CombineItem>,
    /// Keep the input maps before the new ones (`false`: only the new ones).
    pub keep: bool,
}

/// The thin-edge stage: non-maximum suppression of the gradient magnitude
/// along the gradient direction, then hysteresis between two thresholds
/// (Canny, IEEE PAMI 8(6), 1986). It reads an x/y derivative pair (`of`, or
/// the pair `gradient` finds) and gives one map: 1 on edge pixels, 0 elsewhere.
///
/// A pixel is a local maximum when its magnitude m is at least the magnitude
/// one step either way along (x, y)/max(|x|, |y|), each interpolated linearly
/// between the two neighbours that step falls between; edges are the local
/// maxima with m ≥ `low` that are 8-connected, through such maxima, to one
/// with m ≥ `high`. The outermost ring of pixels, which lacks neighbours, is
/// never an edge.
#[derive(Debug, Clone, PartialEq)]
pub struct Thin {
    /// The x and y derivative maps; `None`: the pair found by name.
    pub of: Option<Vec<MapRef>>,
    /// Lower hysteresis threshold (magnitude units).
    pub low: f64,
    /// Upper hysteresis threshold.
    pub high: f64,
    /// The output's name (default `edges`).
    pub name: Option<String>,
    /// Keep the input maps before the edge map.
    pub keep: bool,
}

/// One output resolved: its kind and the positions of its sources in the
/// working list (the stage's input maps, then the outputs before it).
#[derive(Debug, Clone, PartialEq)]
pub struct Resolved {
    /// The kind.
    pub kind: CombineKind,
    /// Source positions.
    pub sources: Vec<usize>,
    /// For `argmax` with angles: the angle of each source.
    pub angles: Vec<f32>,
}

/// A combine stage resolved against the names of its input maps.
#[derive(Debug, Clone, PartialEq)]
pub struct ResolvedCombine {
    /// The outputs in order.
    pub outputs: Vec<Resolved>,
    /// Input maps.
    pub inputs: usize,
    /// Whether the input maps stay.
    pub keep: bool,
}

impl ResolvedCombine {
    /// Maps the stage gives.
    pub fn out_channels(&self) -> usize {
        self.outputs.len() + if self.keep { self.inputs } else { 0 }
    }
}

/// The first x/y derivative pair among `maps` by name: `P-x` and `P-y` with
/// the same `P` (text after an `@`, the channel of colour mode split, must
/// match too). Positions into `maps`.
pub fn find_pair(maps: &[&str]) -> Option<(usize, usize)> {
    let split = |n: &str| -> Option<(String, String)> {
        let (base, ch) = n.split_once('@').unwrap_or((n, ""));
        let stem = base.strip_suffix("-x")?;
        Some((stem.to_string(), ch.to_string()))
    };
    maps.iter().enumerate().find_map(|(i, n)| {
        let (stem, ch) = split(n)?;
        let want = if ch.is_empty() {
            format!("{stem}-y")
        } else {
            format!("{stem}-y@{ch}")
        };
        let j = maps.iter().position(|m| *m == want)?;
        Some((i, j))
    })
}

impl Combine {
    /// Resolves the entries against the stage's input maps; gives the resolved
    /// stage and the maps after it. Fails naming the entry and the maps there.
    pub fn resolve(&self, input: &[MapInfo]) -> Result<(ResolvedCombine, Vec<MapInfo>), Error> {
        let mut work: Vec<MapInfo> = input.to_vec();
        let mut outputs = Vec::new();
        let n_in = input.len();
        for item in &self.items {
            let here = |work: &[MapInfo]| {
                work.iter()
                    .map(|m| m.name.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            };
            let pick = |refs: &[MapRef], work: &[MapInfo]| -> Result<Vec<usize>, Error> {
                refs.iter()
                    .map(|r| match r {
                        MapRef::Index(i) if *i < n_in => Ok(*i),
                        MapRef::Index(i) => Err(Error::recipe(format!(
                            "combine: map index {i} is past the {n_in} input map(s) ({})",
                            here(&work[..n_in])
                        ))),
                        MapRef::Name(n) => {
                            work.iter().position(|m| m.name == *n).ok_or_else(|| {
                                Error::recipe(format!(
                                    "combine: no map named '{n}' here; the maps are: {}",
                                    here(work)
                                ))
                            })
                        }
                    })
                    .collect()
            };
            let sources = match &item.of {
                Some(refs) => pick(refs, &work)?,
                None => (0..n_in).collect(),
            };
            let suffix = item
                .channel
                .as_ref()
                .map_or(String::new(), |c| format!("@{c}"));
            let mut add = |kind: CombineKind,
                           sources: Vec<usize>,
                           name: String,
                           work: &mut Vec<MapInfo>|
             -> Result<(), Error> {
                let (r, info) = resolve_one(kind, sources, format!("{name}{suffix}"), work)?;
                outputs.push(r);
                work.push(info);
                Ok(())
            };
            match &item.what {
                CombineWhat::Kind(k @ CombineKind::Thin { .. }) => {
                    let name = item.name.clone().unwrap_or_else(|| k.name().to_string());
                    let pair = pair_among(&sources, item.of.is_some(), &work, "thin")?;
                    add(k.clone(), pair, name, &mut work)?;
                }
                CombineWhat::Kind(k) => {
                    let name = item.name.clone().unwrap_or_else(|| k.name().to_string());
                    add(k.clone(), sources, name, &mut work)?;
                }
                CombineWhat::Preset(Preset::Gradient) => {
                    if item.name.is_some() {
                        return Err(Error::recipe(
                            "combine 'gradient' makes two maps (magnitude, orientation); \
                             name them with two entries instead of name",
                        ));
                    }
                    let pair = pair_among(&sources, item.of.is_some(), &work, "gradient")?;
                    add(
                        CombineKind::Magnitude,
                        pair.clone(),
                        "magnitude".into(),
                        &mut work,
                    )?;
                    add(
                        CombineKind::Orientation,
                        pair,
                        "orientation".into(),
                        &mut work,
                    )?;
                }
                CombineWhat::Preset(Preset::GaborEnergy) => {
                    if item.name.is_some() {
                        return Err(Error::recipe(
                            "combine 'gabor-energy' makes several maps; it takes no name",
                        ));
                    }
                    let mut angles: Vec<(f64, Vec<usize>)> = Vec::new();
                    for &s in &sources {
                        if let Some(a) = work[s].angle {
                            match angles.iter_mut().find(|(b, _)| *b == a) {
                                Some((_, v)) => v.push(s),
                                None => angles.push((a, vec![s])),
                            }
                        }
                    }
                    if angles.len() < 2 {
                        return Err(Error::recipe(format!(
                            "combine 'gabor-energy' needs kernels at two or more declared angles \
                             (Gabor kernels' theta, or angle = … in the bank file); the maps \
                             here ({}) give {}",
                            here(&work[..n_in]),
                            angles.len()
                        )));
                    }
                    let mut energies = Vec::new();
                    for (a, group) in &angles {
                        energies.push(work.len());
                        add(
                            CombineKind::Energy,
                            group.clone(),
                            format!("energy-{}", angle_text(*a)),
                            &mut work,
                        )?;
                    }
                    add(
                        CombineKind::Max,
                        energies.clone(),
                        "strongest".into(),
                        &mut work,
                    )?;
                    add(
                        CombineKind::Argmax(Gives::Angle),
                        energies,
                        "angle".into(),
                        &mut work,
                    )?;
                }
            }
        }
        let added = work.split_off(n_in);
        for (i, m) in added.iter().enumerate() {
            let clash = added[..i].iter().chain(if self.keep { input } else { &[] });
            if clash.into_iter().any(|o| o.name == m.name) {
                return Err(Error::recipe(format!(
                    "combine: two maps would be named '{}'; give the entry a name",
                    m.name
                )));
            }
        }
        let resolved = ResolvedCombine {
            outputs,
            inputs: n_in,
            keep: self.keep,
        };
        let mut maps = if self.keep { work } else { Vec::new() };
        maps.extend(added);
        Ok((resolved, maps))
    }
}

/// The x/y pair an entry reads: the two maps `of` names, in that order, or
/// else the pair found by name among `sources`.
fn pair_among(
    sources: &[usize],
    named: bool,
    work: &[MapInfo],
    what: &str,
) -> Result<Vec<usize>, Error> {
    if sources.len() == 2 && named {
        return Ok(sources.to_vec());
    }
    let names: Vec<&str> = sources.iter().map(|&s| work[s].name.as_str()).collect();
    let (x, y) = find_pair(&names).ok_or_else(|| {
        Error::recipe(format!(
            "{what} found no x/y derivative pair (maps named P-x and P-y, such as sobel-x \
             and sobel-y) among: {}; give of = [x, y]",
            names.join(", ")
        ))
    })?;
    Ok(vec![sources[x], sources[y]])
}

/// An angle for a map name: `45`, `22.5`.
fn angle_text(a: f64) -> String {
    if a.fract() == 0.0 {
        format!("{a:.0}")
    } else {
        format!("{a}")
    }
}

/// Checks one output's sources and works out what is known of it.
fn resolve_one(
    kind: CombineKind,
    sources: Vec<usize>,
    name: String,
    work: &[MapInfo],
) -> Result<(Resolved, MapInfo), Error> {
    let what = kind.name();
    if sources.is_empty() {
        return Err(Error::recipe(format!("combine '{what}': of names no maps")));
    }
    let src: Vec<&MapInfo> = sources.iter().map(|&s| &work[s]).collect();
    let all_nonneg = src.iter().all(|m| m.non_negative);
    let one_angle = src
        .first()
        .and_then(|m| m.angle)
        .filter(|a| src.iter().all(|m| m.angle == Some(*a)));
    let mut angles = Vec::new();
    let (non_negative, cyclic, angle) = match &kind {
        CombineKind::Magnitude | CombineKind::Energy => (true, None, one_angle),
        CombineKind::Orientation => {
            if src.len() != 2 {
                return Err(Error::recipe(format!(
                    "combine 'orientation' reads two maps (x, y) but has {}: {}; give of = [x, y]",
                    src.len(),
                    src.iter()
                        .map(|m| m.name.as_str())
                        .collect::<Vec<_>>()
                        .join(", ")
                )));
            }
            (false, Some((-180.0, 180.0)), None)
        }
        CombineKind::Max => (all_nonneg, None, one_angle),
        CombineKind::Argmax(Gives::Index) => (true, None, None),
        CombineKind::Argmax(Gives::Angle) => {
            for m in &src {
                let a = m.angle.ok_or_else(|| {
                    Error::recipe(format!(
                        "combine 'argmax' gives angles, but map '{}' declares none (give its \
                         kernel angle = … in the bank file, or gives = \"index\")",
                        m.name
                    ))
                })?;
                angles.push(a as f32);
            }
            let (lo, hi) = angles
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), &a| {
                    (l.min(a as f64), h.max(a as f64))
                });
            // Orientations of line-like kernels repeat every 180°.
            let cyclic = if lo >= 0.0 && hi < 180.0 {
                Some((0.0, 180.0))
            } else if lo >= -180.0 && hi <= 180.0 {
                Some((-180.0, 180.0))
            } else {
                None
            };
            (lo >= 0.0, cyclic, None)
        }
        CombineKind::Sum | CombineKind::Mean => (all_nonneg, None, one_angle),
        CombineKind::Thin { low, high } => {
            let (low, high) = (*low, *high);
            if !(low.is_finite() && high.is_finite() && low >= 0.0 && low <= high) {
                return Err(Error::recipe(format!(
                    "thin: thresholds low {low} and high {high} must be finite, with \
                     0 ≤ low ≤ high"
                )));
            }
            (true, None, None)
        }
        CombineKind::Weighted(w) => {
            if w.len() != src.len() {
                return Err(Error::recipe(format!(
                    "combine 'weighted' has {} weight(s) for {} map(s)",
                    w.len(),
                    src.len()
                )));
            }
            if let Some(b) = w
                .iter()
                .find(|v| !v.is_finite() || v.abs() > f32::MAX as f64)
            {
                return Err(Error::recipe(format!(
                    "combine 'weighted': weight {b} is not a finite float32 number"
                )));
            }
            (all_nonneg && w.iter().all(|v| *v >= 0.0), None, one_angle)
        }
    };
    Ok((
        Resolved {
            kind,
            sources,
            angles,
        },
        MapInfo {
            name,
            angle,
            non_negative,
            cyclic,
        },
    ))
}

impl Thin {
    /// The stage as a combine of one entry, which is how it runs.
    pub fn as_combine(&self) -> Combine {
        Combine {
            items: vec![CombineItem {
                what: CombineWhat::Kind(CombineKind::Thin {
                    low: self.low,
                    high: self.high,
                }),
                of: self.of.clone(),
                name: self.name.clone(),
                channel: None,
            }],
            keep: self.keep,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn maps(names: &[&str]) -> Vec<MapInfo> {
        names
            .iter()
            .map(|n| MapInfo::plain(n.to_string(), false))
            .collect()
    }

    #[test]
    fn pairs_are_found_by_name() {
        assert_eq!(
            find_pair(&["sobel-x", "sobel-y", "laplace-8"]),
            Some((0, 1))
        );
        assert_eq!(
            find_pair(&["laplace-8", "scharr-y", "scharr-x"]),
            Some((2, 1))
        );
        assert_eq!(
            find_pair(&["a-x@r", "a-x@g", "a-y@g", "a-y@r"]),
            Some((0, 3))
        );
        assert_eq!(find_pair(&["sobel-x", "scharr-y"]), None);
    }

    #[test]
    fn gradient_gives_magnitude_then_orientation() {
        let c = Combine {
            items: vec![CombineItem::of_all(CombineWhat::Preset(Preset::Gradient))],
            keep: true,
        };
        let (r, out) = c
            .resolve(&maps(&["sobel-x", "sobel-y", "laplace-8"]))
            .unwrap();
        let names: Vec<&str> = out.iter().map(|m| m.name.as_str()).collect();
        assert_eq!(
            names,
            [
                "sobel-x",
                "sobel-y",
                "laplace-8",
                "magnitude",
                "orientation"
            ]
        );
        assert_eq!(r.outputs[0].sources, [0, 1]);
        assert!(out[3].non_negative && out[4].cyclic.is_some());
        let dropped = Combine { keep: false, ..c };
        assert_eq!(
            dropped
                .resolve(&maps(&["sobel-x", "sobel-y"]))
                .unwrap()
                .1
                .len(),
            2
        );
    }

    #[test]
    fn bad_references_say_what_is_there() {
        let c = Combine {
            items: vec![CombineItem {
                what: CombineWhat::Kind(CombineKind::Magnitude),
                of: Some(vec![MapRef::Name("sobel-z".into())]),
                name: None,
                channel: None,
            }],
            keep: true,
        };
        let e = c
            .resolve(&maps(&["sobel-x", "sobel-y"]))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("sobel-z") && e.contains("sobel-x, sobel-y"),
            "{e}"
        );
    }
}
