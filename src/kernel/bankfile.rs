//! Bank files: our TOML schema, read and written.
//!
//! ```toml
//! name = "line-a-edges"          # the bank's name
//! op = "correlate"               # how the taps are meant: correlate | convolve
//! description = "free text"      # optional
//! pad = "symmetric"              # optional: the pad mode where no recipe or flag names
//!                                # one (`bank import` writes "zero"; see stage::pads)
//! normalize = { mean = [0.485, 0.456, 0.406], std = [0.229, 0.224, 0.225] }
//!                                # optional: input normalisation per channel, applied
//!                                # before the conv stage (learned banks)
//! contrast = 0.000154            # optional: divide each response by sqrt(window
//!                                # variance + this) before the bias (bank learn)
//!
//! [learned]                      # optional: where `bank learn` got the bank from;
//!                                # kept and shown, never used to compute
//!
//! [[kernel]]                     # one table per output channel, in order
//! name = "sobel-x"
//! taps = [[-1, 0, 1], [-2, 0, 2], [-1, 0, 1]]   # one plane, rows top to bottom
//! scale = 1.0                    # optional, default 1
//! bias = 0.0                     # optional, default 0
//! angle = 0.0                    # optional: the orientation in degrees it stands for
//!                                # (argmax combines report it; Gabor kernels: theta)
//!
//! [[kernel]]
//! name = "colour-edge"
//! planes = [ [[..]], [[..]], [[..]] ]   # instead of taps: one plane per input channel
//!
//! [[kernel]]
//! name = "blur"
//! family = "gaussian"            # instead of taps: a built-in family …
//! params = { sigma = 1.5 }       # … with its parameters
//! ```
//!
//! Unknown keys are refused. Writing keeps a family kernel as family and params,
//! so that `read(write(bank)) == bank` exactly (taps are f64, which TOML holds
//! without loss).

use std::collections::BTreeMap;
use std::path::Path;

use serde::{Deserialize, Serialize};
use toml::Spanned;

use crate::error::Error;
use crate::kernel::{plane_from_rows, Bank, FamilySpec, Kernel, Op};

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FileIn {
    name: Option<String>,
    op: Option<Op>,
    description: Option<String>,
    pad: Option<crate::border::PadMode>,
    normalize: Option<Spanned<NormalizeIn>>,
    contrast: Option<Spanned<f64>>,
    learned: Option<toml::Table>,
    #[serde(default)]
    kernel: Vec<Spanned<KernelIn>>,
}

#[derive(Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
struct NormalizeIn {
    mean: Vec<f64>,
    std: Vec<f64>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct KernelIn {
    name: Option<String>,
    taps: Option<Spanned<Vec<Vec<f64>>>>,
    planes: Option<Spanned<Vec<Vec<Vec<f64>>>>>,
    family: Option<String>,
    params: Option<BTreeMap<String, f64>>,
    scale: Option<Spanned<f64>>,
    bias: Option<Spanned<f64>>,
    angle: Option<Spanned<f64>>,
}

#[derive(Serialize)]
struct FileOut<'a> {
    name: &'a str,
    op: Op,
    #[serde(skip_serializing_if = "Option::is_none")]
    description: Option<&'a str>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pad: Option<crate::border::PadMode>,
    #[serde(skip_serializing_if = "Option::is_none")]
    normalize: Option<NormalizeIn>,
    #[serde(skip_serializing_if = "Option::is_none")]
    contrast: Option<f64>,
    kernel: Vec<KernelOut<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    learned: Option<&'a toml::Table>,
}

#[derive(Serialize)]
struct KernelOut<'a> {
    name: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    family: Option<&'a str>,
    #[serde(skip_serializing_if = "Option::is_none")]
    params: Option<&'a BTreeMap<String, f64>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    taps: Option<Vec<Vec<f64>>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    planes: Option<Vec<Vec<Vec<f64>>>>,
    scale: f64,
    bias: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    angle: Option<f64>,
}

/// 1-based line and column of a byte offset (bank and recipe files).
pub(crate) fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line = before.matches('\n').count() + 1;
    let col = before
        .rfind('\n')
        .map_or(before.len(), |i| before.len() - i - 1)
        + 1;
    (line, col)
}

/// A TOML parse error's place (line, column) and message.
pub(crate) fn toml_error(text: &str, e: &toml::de::Error) -> (Option<(usize, usize)>, String) {
    (
        e.span().map(|s| line_col(text, s.start)),
        e.message().trim_end().to_string(),
    )
}

/// Parses a bank from TOML text; `origin` names the file in messages.
pub fn parse_bank(text: &str, origin: &Path) -> Result<Bank, Error> {
    let located = |at: Option<(usize, usize)>, message: String| Error::Bank {
        file: Some(origin.to_path_buf()),
        at,
        message,
    };
    let err = |message: String| located(None, message);
    let at = |span: std::ops::Range<usize>, message: String| {
        located(Some(line_col(text, span.start)), message)
    };
    let file: FileIn = toml::from_str(text).map_err(|e| {
        let (place, message) = toml_error(text, &e);
        located(place, message)
    })?;
    let stem = origin.file_stem().map(|s| s.to_string_lossy().into_owned());
    let name = file.name.or(stem).unwrap_or_else(|| "bank".into());
    if file.kernel.is_empty() {
        return Err(err(
            "no [[kernel]] tables: a bank needs at least one kernel".into(),
        ));
    }
    let mut kernels = Vec::with_capacity(file.kernel.len());
    for (i, sk) in file.kernel.into_iter().enumerate() {
        let span = sk.span();
        let k = sk.into_inner();
        let kname = k.name.clone().unwrap_or_else(|| match &k.family {
            Some(f) => FamilySpec {
                family: f.clone(),
                params: k.params.clone().unwrap_or_default(),
            }
            .to_string(),
            None => format!("k{i}"),
        });
        let sources = [k.taps.is_some(), k.planes.is_some(), k.family.is_some()];
        if sources.iter().filter(|b| **b).count() != 1 {
            return Err(at(
                span,
                format!("kernel '{kname}' needs exactly one of taps, planes or family"),
            ));
        }
        if k.params.is_some() && k.family.is_none() {
            return Err(at(
                span,
                format!("kernel '{kname}' has params but no family"),
            ));
        }
        let mut kernel = if let Some(t) = k.taps {
            let s = t.span();
            Kernel::from_rows(&kname, t.get_ref()).map_err(|e| at(s, e.problem()))?
        } else if let Some(ps) = k.planes {
            let s = ps.span();
            let ps = ps.into_inner();
            if ps.is_empty() {
                return Err(at(s, format!("kernel '{kname}' has an empty planes list")));
            }
            let mut planes = Vec::with_capacity(ps.len());
            let mut shape = None;
            for (c, rows) in ps.iter().enumerate() {
                let (r, w, p) = plane_from_rows(&format!("{kname}' plane '{c}"), rows)
                    .map_err(|e| at(s.clone(), e.problem()))?;
                if *shape.get_or_insert((r, w)) != (r, w) {
                    let (r0, w0) = shape.unwrap_or_default();
                    return Err(at(
                        s,
                        format!("kernel '{kname}': plane {c} is {r}×{w} but plane 0 is {r0}×{w0}"),
                    ));
                }
                planes.push(p);
            }
            let (rows, cols) = shape.unwrap_or_default();
            Kernel {
                name: kname.clone(),
                rows,
                cols,
                planes,
                scale: 1.0,
                bias: 0.0,
                origin: None,
                angle: None,
            }
        } else {
            let spec = FamilySpec {
                family: k.family.unwrap_or_default(),
                params: k.params.unwrap_or_default(),
            };
            spec.build(Some(&kname))
                .map_err(|e| at(span.clone(), e.problem()))?
        };
        for (field, v, target) in [
            ("scale", k.scale, &mut kernel.scale),
            ("bias", k.bias, &mut kernel.bias),
        ] {
            if let Some(v) = v {
                crate::kernel::check_number(&kname, field, *v.get_ref())
                    .map_err(|e| at(v.span(), e.problem()))?;
                *target = *v.get_ref();
            }
        }
        if let Some(a) = k.angle {
            crate::kernel::check_number(&kname, "angle", *a.get_ref())
                .map_err(|e| at(a.span(), e.problem()))?;
            kernel.angle = Some(*a.get_ref());
        }
        kernel.validate().map_err(|e| at(span, e.problem()))?;
        kernels.push(kernel);
    }
    let mut normalize = None;
    if let Some(n) = file.normalize {
        let span = n.span();
        let n = n.into_inner();
        let norm = crate::kernel::Normalize {
            mean: n.mean,
            std: n.std,
        };
        norm.validate(kernels[0].channels())
            .map_err(|e| at(span, e.problem()))?;
        normalize = Some(norm);
    }
    let contrast = match file.contrast {
        Some(c) => {
            let v = *c.get_ref();
            crate::kernel::check_contrast(v).map_err(|e| at(c.span(), e.problem()))?;
            Some(v)
        }
        None => None,
    };
    // Banks that `bank import` wrote before bank files named their pad mode
    // say where they came from; they keep zero, what the network saw.
    let imported = file
        .description
        .as_deref()
        .is_some_and(|d| d.starts_with("imported from "));
    let bank = Bank {
        name,
        op: file.op.unwrap_or(Op::Correlate),
        pad: file
            .pad
            .or(imported.then_some(crate::border::PadMode::Zero)),
        description: file.description,
        kernels,
        normalize,
        contrast,
        provenance: file.learned.map(Box::new),
    };
    bank.validate().map_err(|e| err(e.problem()))?;
    Ok(bank)
}

/// Reads a bank file.
pub fn read_bank(path: &Path) -> Result<Bank, Error> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    parse_bank(&text, path)
}

/// Writes a bank as TOML text in our schema.
pub fn bank_to_toml(bank: &Bank) -> Result<String, Error> {
    let kernel = bank
        .kernels
        .iter()
        .map(|k| {
            let (family, params, taps, planes) = match &k.origin {
                Some(spec) => (Some(spec.family.as_str()), Some(&spec.params), None, None),
                None if k.channels() == 1 => (None, None, Some(k.plane_rows(0)), None),
                None => (
                    None,
                    None,
                    None,
                    Some((0..k.channels()).map(|c| k.plane_rows(c)).collect()),
                ),
            };
            KernelOut {
                name: &k.name,
                family,
                params,
                taps,
                planes,
                scale: k.scale,
                bias: k.bias,
                angle: k.angle,
            }
        })
        .collect();
    let out = FileOut {
        name: &bank.name,
        op: bank.op,
        description: bank.description.as_deref(),
        pad: bank.pad,
        normalize: bank.normalize.as_ref().map(|n| NormalizeIn {
            mean: n.mean.clone(),
            std: n.std.clone(),
        }),
        contrast: bank.contrast,
        kernel,
        learned: bank.provenance.as_deref(),
    };
    let body = toml::to_string(&out).map_err(|e| Error::bank(format!("cannot write bank: {e}")))?;
    Ok(format!("# tapmap bank file\n{body}"))
}
