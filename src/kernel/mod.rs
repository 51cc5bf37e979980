//! Kernels and banks: the taps, how they are meant (`op`), and where they came from.
//!
//! A [`Kernel`] is a k_h × k_w array of taps, with one plane per input channel
//! (one plane for grey input), a `scale` that multiplies the sum and a `bias`
//! added after it:
//!
//! ```text
//! out(y, x) = scale · Σ_c Σ_(u,v) t_c(u, v) · in_c(y·s + u·d, x·s + v·d) + bias
//! ```
//!
//! for `correlate`; `convolve` first rotates every plane by 180°.
//! A [`Bank`] is an ordered, named list of kernels; kernel `n` makes output channel `n`.
//! Taps are kept in f64 so that bank files round-trip exactly; the engine works in f32.

pub mod analysis;
pub mod bankfile;
pub mod builtin;
pub mod describe;
pub mod families;
pub mod import;
pub mod tensors;

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::error::Error;
pub use families::FamilySpec;

/// How a bank's taps are applied.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Op {
    /// True convolution: taps rotated by 180° before the sliding dot product.
    Convolve,
    /// Sliding dot product with the taps as written (what CNN layers compute).
    Correlate,
}

impl Op {
    /// The name used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            Op::Convolve => "convolve",
            Op::Correlate => "correlate",
        }
    }
}

impl fmt::Display for Op {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Op {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "convolve" => Ok(Op::Convolve),
            "correlate" => Ok(Op::Correlate),
            other => Err(format!(
                "unknown op '{other}'; expected convolve or correlate"
            )),
        }
    }
}

/// One kernel: taps (one plane per input channel), scale, bias and name.
#[derive(Debug, Clone, PartialEq)]
pub struct Kernel {
    /// Name of the output channel this kernel makes.
    pub name: String,
    /// Rows of taps (k_h).
    pub rows: usize,
    /// Columns of taps (k_w).
    pub cols: usize,
    /// One row-major `rows × cols` plane per input channel.
    pub planes: Vec<Vec<f64>>,
    /// Multiplies the weighted sum.
    pub scale: f64,
    /// Added after scaling.
    pub bias: f64,
    /// The built-in family and parameters this kernel was made from, if any.
    pub origin: Option<FamilySpec>,
    /// The orientation in degrees the bank file declares for this kernel
    /// (`angle = …`), if it does; see [`Kernel::declared_angle`].
    pub angle: Option<f64>,
}

impl Kernel {
    /// The orientation in degrees this kernel stands for: the bank file's
    /// `angle`, else a Gabor family kernel's `theta` (default 0). What an
    /// `argmax` combine with `gives = "angle"` reports.
    pub fn declared_angle(&self) -> Option<f64> {
        self.angle.or_else(|| {
            let o = self.origin.as_ref().filter(|o| o.family == "gabor")?;
            Some(o.params.get("theta").copied().unwrap_or(0.0))
        })
    }

    /// A one-plane kernel from row-major taps; checks shape and finiteness.
    pub fn from_rows(name: &str, rows: &[Vec<f64>]) -> Result<Kernel, Error> {
        let (r, c, plane) = plane_from_rows(name, rows)?;
        Ok(Kernel {
            name: name.to_string(),
            rows: r,
            cols: c,
            planes: vec![plane],
            scale: 1.0,
            bias: 0.0,
            origin: None,
            angle: None,
        })
    }

    /// Number of input channels this kernel expects.
    pub fn channels(&self) -> usize {
        self.planes.len()
    }

    /// Tap `(row, col)` of plane `c`.
    pub fn tap(&self, c: usize, row: usize, col: usize) -> f64 {
        self.planes[c][row * self.cols + col]
    }

    /// Plane `c` as a vector of rows.
    pub fn plane_rows(&self, c: usize) -> Vec<Vec<f64>> {
        self.planes[c]
            .chunks(self.cols)
            .map(|r| r.to_vec())
            .collect()
    }

    /// Plane `c` rotated by 180° (row-major), as convolution applies it.
    pub fn rotated_plane(&self, c: usize) -> Vec<f64> {
        self.planes[c].iter().rev().copied().collect()
    }

    /// Checks the invariants every kernel must hold: at least one tap and one
    /// plane, planes of the stated size, taps, scale and bias finite and
    /// representable in f32 (the engine's precision), and a largest possible
    /// response, Σ|taps| · |scale| over inputs in [−1, 1], that f32 can hold.
    pub fn validate(&self) -> Result<(), Error> {
        let n = &self.name;
        if self.rows == 0 || self.cols == 0 {
            return Err(Error::bank(format!("kernel '{n}' has no taps")));
        }
        if self.planes.is_empty() {
            return Err(Error::bank(format!("kernel '{n}' has no planes")));
        }
        for (c, p) in self.planes.iter().enumerate() {
            if p.len() != self.rows * self.cols {
                return Err(Error::bank(format!(
                    "kernel '{n}' plane {c} has {} taps, expected {}×{}",
                    p.len(),
                    self.rows,
                    self.cols
                )));
            }
            let label = if self.planes.len() > 1 {
                format!("'{n}' plane {c}")
            } else {
                format!("'{n}'")
            };
            check_taps(&label, p, self.cols)?;
        }
        check_number(n, "scale", self.scale)?;
        check_number(n, "bias", self.bias)?;
        let l1: f64 = self.planes.iter().flatten().map(|t| t.abs()).sum();
        if l1 * self.scale.abs() > f32::MAX as f64 {
            return Err(Error::bank(format!(
                "kernel '{n}': the sum of its |taps| times its scale ({:e}) is larger than float32 \
                 can hold, so every response would overflow; scale the taps down",
                l1 * self.scale.abs()
            )));
        }
        Ok(())
    }
}

/// Checks a plane's taps (row-major, `cols` wide) for kernel `label`: each
/// finite and within float32's range.
pub(crate) fn check_taps(label: &str, taps: &[f64], cols: usize) -> Result<(), Error> {
    if let Some(i) = taps
        .iter()
        .position(|v| !v.is_finite() || v.abs() > f32::MAX as f64)
    {
        let what = if taps[i].is_finite() {
            "a tap too large for float32"
        } else {
            "a non-finite tap"
        };
        return Err(Error::bank(format!(
            "kernel {label} has {what} {} at row {}, column {}",
            taps[i],
            i / cols.max(1),
            i % cols.max(1)
        )));
    }
    Ok(())
}

/// Checks a bank's contrast ε: finite, above 0, within float32's range.
pub(crate) fn check_contrast(eps: f64) -> Result<(), Error> {
    if !(eps.is_finite() && eps > 0.0 && eps <= f32::MAX as f64) {
        return Err(Error::bank(format!(
            "contrast {eps} must be a finite number above 0 (within float32's range)"
        )));
    }
    Ok(())
}

/// Checks a kernel's scale or bias: finite and within float32's range.
pub(crate) fn check_number(kernel: &str, field: &str, v: f64) -> Result<(), Error> {
    if !v.is_finite() {
        return Err(Error::bank(format!(
            "kernel '{kernel}': {field} must be finite, got {v}"
        )));
    }
    if v.abs() > f32::MAX as f64 {
        return Err(Error::bank(format!(
            "kernel '{kernel}': {field} {v:e} is too large for float32"
        )));
    }
    Ok(())
}

/// Turns rows of taps into (rows, cols, row-major plane), refusing empty, ragged
/// and non-finite input.
pub fn plane_from_rows(name: &str, rows: &[Vec<f64>]) -> Result<(usize, usize, Vec<f64>), Error> {
    let r = rows.len();
    let c = rows.first().map_or(0, Vec::len);
    if r == 0 || c == 0 {
        return Err(Error::bank(format!("kernel '{name}' has empty taps")));
    }
    if let Some((i, row)) = rows.iter().enumerate().find(|(_, row)| row.len() != c) {
        return Err(Error::bank(format!(
            "kernel '{name}' has ragged taps: row 0 has {c} values but row {i} has {}",
            row.len()
        )));
    }
    let plane: Vec<f64> = rows.iter().flatten().copied().collect();
    check_taps(&format!("'{name}'"), &plane, c)?;
    Ok((r, c, plane))
}

/// An ordered, named set of kernels, with the op its taps are meant for.
#[derive(Debug, Clone, PartialEq)]
pub struct Bank {
    /// The bank's name.
    pub name: String,
    /// How the taps are meant.
    pub op: Op,
    /// Free text.
    pub description: Option<String>,
    /// The kernels; kernel `n` makes output channel `n`.
    pub kernels: Vec<Kernel>,
    /// Input normalisation the bank was trained with, applied before its conv
    /// stage: x' = (x − mean_c) / std_c per input channel.
    pub normalize: Option<Normalize>,
    /// The pad mode the bank asks for where neither the recipe nor a flag
    /// names one (imported weights: zero, what the network saw); `None`: the
    /// default for built-in and hand-written banks ([`crate::stage::DEFAULT_PAD`]).
    pub pad: Option<crate::border::PadMode>,
    /// Patch contrast normalisation (learned banks, `bank learn`): every
    /// response is divided by sqrt(v + ε), with v the variance of the input
    /// samples its window reads (all channels together, population variance),
    /// before the kernel's bias is added. `Some(ε)`, ε > 0, in the input's units.
    pub contrast: Option<f64>,
    /// Where a learned bank came from (`[learned]` in the bank file): kept as
    /// written, shown by `bank show`, never used to compute.
    pub provenance: Option<Box<toml::Table>>,
}

/// Per-channel input normalisation, in the [0, 1] units of the image reader.
#[derive(Debug, Clone, PartialEq)]
pub struct Normalize {
    /// Mean per input channel.
    pub mean: Vec<f64>,
    /// Standard deviation per input channel (never 0).
    pub std: Vec<f64>,
}

impl Normalize {
    /// Checks the counts against `channels`, and that every std is finite and non-zero.
    pub fn validate(&self, channels: usize) -> Result<(), Error> {
        if self.mean.len() != channels || self.std.len() != channels {
            return Err(Error::bank(format!(
                "normalisation has {} mean and {} std values but the kernels take {channels} channel(s)",
                self.mean.len(),
                self.std.len()
            )));
        }
        if let Some(s) = self.std.iter().find(|s| !s.is_finite() || **s == 0.0) {
            return Err(Error::bank(format!(
                "normalisation std {s} must be finite and non-zero"
            )));
        }
        if let Some(m) = self.mean.iter().find(|m| !m.is_finite()) {
            return Err(Error::bank(format!(
                "normalisation mean {m} must be finite"
            )));
        }
        Ok(())
    }

    /// Applies the normalisation to a `C × H × W` array in place.
    pub fn apply(&self, x: &mut ndarray::Array3<f32>) {
        for (c, mut plane) in x.outer_iter_mut().enumerate() {
            let (m, s) = (self.mean[c] as f32, self.std[c] as f32);
            plane.mapv_inplace(|v| (v - m) / s);
        }
    }
}

impl Bank {
    /// Checks every kernel, that there is at least one, that names are unique and
    /// that all kernels take the same number of input channels.
    pub fn validate(&self) -> Result<(), Error> {
        if self.kernels.is_empty() {
            return Err(Error::bank(format!("bank '{}' has no kernels", self.name)));
        }
        for k in &self.kernels {
            k.validate()?;
        }
        let c0 = self.kernels[0].channels();
        if let Some(k) = self.kernels.iter().find(|k| k.channels() != c0) {
            return Err(Error::bank(format!(
                "bank '{}': kernel '{}' has {} planes but '{}' has {c0}; all kernels of a bank \
                 must take the same input channels",
                self.name,
                k.name,
                k.channels(),
                self.kernels[0].name
            )));
        }
        if let Some(n) = &self.normalize {
            n.validate(c0)
                .map_err(|e| Error::bank(format!("bank '{}': {e}", self.name)))?;
        }
        if let Some(eps) = self.contrast {
            check_contrast(eps).map_err(|e| Error::bank(format!("bank '{}': {e}", self.name)))?;
            let k0 = &self.kernels[0];
            if let Some(k) = self
                .kernels
                .iter()
                .find(|k| (k.rows, k.cols) != (k0.rows, k0.cols))
            {
                return Err(Error::bank(format!(
                    "bank '{}': contrast normalisation reads one window for all kernels, but \
                     '{}' is {}×{} and '{}' is {}×{}",
                    self.name, k.name, k.rows, k.cols, k0.name, k0.rows, k0.cols
                )));
            }
        }
        let mut names: Vec<&str> = self.kernels.iter().map(|k| k.name.as_str()).collect();
        names.sort_unstable();
        if let Some(w) = names.windows(2).find(|w| w[0] == w[1]) {
            return Err(Error::bank(format!(
                "bank '{}' has two kernels named '{}'; names label output channels and must differ",
                self.name, w[0]
            )));
        }
        Ok(())
    }

    /// SHA-256 (hex) over the bank's canonical taps: the bytes
    /// `tapmap-bank-v1\n`, the op name and a newline, then per kernel its UTF-8
    /// name, a zero byte, rows, cols and plane count as u64 little-endian, every
    /// tap, the scale and the bias as f64 little-endian. Two banks with this
    /// digest compute the same thing whatever their file looked like.
    pub fn digest(&self) -> String {
        use sha2::{Digest, Sha256};
        let mut h = Sha256::new();
        h.update(b"tapmap-bank-v1\n");
        h.update(self.op.name().as_bytes());
        h.update(b"\n");
        for k in &self.kernels {
            h.update(k.name.as_bytes());
            h.update([0u8]);
            for n in [k.rows, k.cols, k.planes.len()] {
                h.update((n as u64).to_le_bytes());
            }
            for t in k.planes.iter().flatten().chain([&k.scale, &k.bias]) {
                h.update(t.to_le_bytes());
            }
        }
        if let Some(n) = &self.normalize {
            h.update(b"normalize");
            for v in n.mean.iter().chain(&n.std) {
                h.update(v.to_le_bytes());
            }
        }
        // Only declared angles enter, so banks without them keep their digests.
        for (i, k) in self.kernels.iter().enumerate() {
            if let Some(a) = k.angle {
                h.update(b"angle");
                h.update((i as u64).to_le_bytes());
                h.update(a.to_le_bytes());
            }
        }
        if let Some(eps) = self.contrast {
            h.update(b"contrast");
            h.update(eps.to_le_bytes());
        }
        crate::digest::hex(&h.finalize())
    }

    /// Input channels every kernel expects.
    pub fn channels(&self) -> usize {
        self.kernels.first().map_or(0, Kernel::channels)
    }
}
