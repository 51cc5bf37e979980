//! Turning trained weights into a bank.
//!
//! A 4-D weight tensor is out × in × k_h × k_w (`oihw`, as most frameworks export
//! convolution weights) or k_h × k_w × in × out (`hwio`); a 3-D tensor is
//! out × k_h × k_w with one input channel. Output channel n becomes kernel `fNN`
//! with one plane per input channel. An optional 1-D bias tensor of length `out`
//! becomes the kernels' biases; an optional per-channel mean and std is kept as
//! the bank's input normalisation. Imported banks declare `correlate`, which is
//! what network layers compute, unless told otherwise.

use std::fmt;
use std::path::Path;
use std::str::FromStr;

use crate::error::Error;
use crate::kernel::tensors::{read_tensor, Tensor};
use crate::kernel::{Bank, Kernel, Normalize, Op};

/// Axis order of a 4-D weight tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Layout {
    /// out × in × k_h × k_w.
    #[default]
    Oihw,
    /// k_h × k_w × in × out.
    Hwio,
}

impl FromStr for Layout {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "oihw" => Ok(Layout::Oihw),
            "hwio" => Ok(Layout::Hwio),
            o => Err(format!("unknown layout '{o}'; expected oihw or hwio")),
        }
    }
}

impl fmt::Display for Layout {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Layout::Oihw => "oihw",
            Layout::Hwio => "hwio",
        })
    }
}

/// How to import.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ImportOptions {
    /// Weight tensor name (needed when the file holds several candidates).
    pub tensor: Option<String>,
    /// Bias tensor name.
    pub bias: Option<String>,
    /// Axis order of the weights.
    pub layout: Layout,
    /// Per-channel mean of the training input normalisation.
    pub mean: Option<Vec<f64>>,
    /// Per-channel std of the training input normalisation.
    pub std: Option<Vec<f64>>,
    /// Op to declare (default correlate).
    pub op: Option<Op>,
}

fn err(path: &Path, m: impl Into<String>) -> Error {
    Error::Bank {
        file: Some(path.to_path_buf()),
        at: None,
        message: m.into(),
    }
}

/// Kernels from a weight tensor (see the module header).
pub fn kernels_from(t: &Tensor, layout: Layout, path: &Path) -> Result<Vec<Kernel>, Error> {
    let (o, i, kh, kw) = match (t.shape.as_slice(), layout) {
        ([o, kh, kw], _) => (*o, 1, *kh, *kw),
        ([o, i, kh, kw], Layout::Oihw) => (*o, *i, *kh, *kw),
        ([kh, kw, i, o], Layout::Hwio) => (*o, *i, *kh, *kw),
        (s, _) => {
            return Err(err(
                path,
                format!("tensor {} has {} dimensions {s:?}; weights must be 4-D ({layout}) or 3-D (out×kh×kw)", t.name, s.len()),
            ))
        }
    };
    if o == 0 || i == 0 || kh == 0 || kw == 0 {
        return Err(err(
            path,
            format!("tensor {} has a zero-sized dimension {:?}", t.name, t.shape),
        ));
    }
    let at = |n: usize, c: usize, y: usize, x: usize| -> f64 {
        let idx = match (t.shape.len(), layout) {
            (3, _) => (n * kh + y) * kw + x,
            (_, Layout::Oihw) => ((n * i + c) * kh + y) * kw + x,
            (_, Layout::Hwio) => ((y * kw + x) * i + c) * o + n,
        };
        t.data[idx] as f64
    };
    let width = (o - 1).to_string().len().max(2);
    Ok((0..o)
        .map(|n| Kernel {
            name: format!("f{n:0width$}"),
            rows: kh,
            cols: kw,
            planes: (0..i)
                .map(|c| {
                    (0..kh)
                        .flat_map(|y| (0..kw).map(move |x| (y, x)))
                        .map(|(y, x)| at(n, c, y, x))
                        .collect()
                })
                .collect(),
            scale: 1.0,
            bias: 0.0,
            origin: None,
            angle: None,
        })
        .collect())
}

/// Imports a bank from a weight file.
pub fn import_bank(path: &Path, opts: &ImportOptions) -> Result<Bank, Error> {
    let t = read_tensor(path, opts.tensor.as_deref())?;
    let mut kernels = kernels_from(&t, opts.layout, path)?;
    if let Some(bname) = &opts.bias {
        let b = read_tensor(path, Some(bname))?;
        if b.shape.len() != 1 || b.shape[0] != kernels.len() {
            return Err(err(
                path,
                format!(
                    "bias {} has shape {:?} but the weights have {} output channels",
                    b.name,
                    b.shape,
                    kernels.len()
                ),
            ));
        }
        for (k, v) in kernels.iter_mut().zip(&b.data) {
            k.bias = *v as f64;
        }
    }
    let channels = kernels[0].channels();
    let normalize = match (&opts.mean, &opts.std) {
        (None, None) => None,
        (Some(m), Some(s)) => {
            let n = Normalize {
                mean: m.clone(),
                std: s.clone(),
            };
            n.validate(channels).map_err(|e| err(path, e.problem()))?;
            Some(n)
        }
        _ => return Err(err(path, "give --mean and --std together")),
    };
    let stem = path
        .file_stem()
        .map_or_else(|| "weights".into(), |s| s.to_string_lossy().into_owned());
    let name = match &opts.tensor {
        Some(t) => format!("{stem}:{t}"),
        None => stem,
    };
    let bank = Bank {
        name,
        op: opts.op.unwrap_or(Op::Correlate),
        // What the network saw in training.
        pad: Some(crate::border::PadMode::Zero),
        description: Some(format!(
            "imported from {} tensor {} {:?} ({}, {}){}",
            path.file_name()
                .map_or_else(String::new, |n| n.to_string_lossy().into_owned()),
            t.name,
            t.shape,
            t.dtype,
            opts.layout,
            opts.bias
                .as_ref()
                .map_or(String::new(), |b| format!(", bias {b}"))
        )),
        kernels,
        normalize,
        contrast: None,
        provenance: None,
    };
    bank.validate().map_err(|e| e.in_file(path))?;
    Ok(bank)
}

/// True for names of weight files (`.npy`, `.npz`, `.safetensors`), with or
/// without a `:TENSOR` suffix.
pub fn is_weight_file(arg: &str) -> Option<(&str, Option<&str>)> {
    let exts = [".npy", ".npz", ".safetensors"];
    if exts.iter().any(|e| arg.ends_with(e)) {
        return Some((arg, None));
    }
    let (file, tensor) = arg.rsplit_once(':')?;
    exts.iter()
        .any(|e| file.ends_with(e))
        .then_some((file, Some(tensor)))
}
