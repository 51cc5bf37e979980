//! Output sizes and padding of a sliding-window stage, one axis at a time.
//!
//! For an input of `i` samples, a kernel of `k` taps, dilation `d`, stride `s` and
//! padding `p_before`, `p_after`, the number of outputs is
//!
//! ```text
//! k_eff = d·(k − 1) + 1
//! o     = floor((i + p_before + p_after − k_eff) / s) + 1
//! ```
//!
//! (Dumoulin & Visin 2016, "A guide to convolution arithmetic for deep learning",
//! relationship 15, which reduces to relationships 1–6 for d = 1.)
//!
//! The extents:
//! - `valid`: no padding;
//! - `same`: output size ceil(i / s); the padding needed for that is split with the
//!   odd sample on the after side;
//! - `full`: k_eff − 1 on each side, so every partial overlap gives an output;
//! - explicit: the caller's numbers.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::error::Error;

/// How much padding a stage adds around its input.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Extent {
    /// No padding: only windows entirely inside the input.
    Valid,
    /// Output size ceil(input / stride); the extra padding sample goes after.
    Same,
    /// k_eff − 1 on each side.
    Full,
    /// Explicit padding: top, bottom, left, right.
    Explicit(PadWidth),
}

/// Explicit padding in samples on each side.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
pub struct PadWidth {
    /// Rows added above.
    pub top: usize,
    /// Rows added below.
    pub bottom: usize,
    /// Columns added on the left.
    pub left: usize,
    /// Columns added on the right.
    pub right: usize,
}

impl FromStr for PadWidth {
    type Err = String;
    /// `N` (all four sides) or `TOP,BOTTOM,LEFT,RIGHT`.
    fn from_str(s: &str) -> Result<Self, String> {
        let parts: Result<Vec<usize>, _> =
            s.split(',').map(|p| p.trim().parse::<usize>()).collect();
        let parts = parts.map_err(|_| {
            format!("pad width '{s}' is not one whole number or four (top,bottom,left,right)")
        })?;
        match parts.as_slice() {
            [n] => Ok(PadWidth {
                top: *n,
                bottom: *n,
                left: *n,
                right: *n,
            }),
            [t, b, l, r] => Ok(PadWidth {
                top: *t,
                bottom: *b,
                left: *l,
                right: *r,
            }),
            _ => Err(format!(
                "pad width '{s}' has {} numbers; give one, or four (top,bottom,left,right)",
                parts.len()
            )),
        }
    }
}

impl fmt::Display for Extent {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Extent::Valid => write!(f, "valid"),
            Extent::Same => write!(f, "same"),
            Extent::Full => write!(f, "full"),
            Extent::Explicit(p) => write!(f, "{},{},{},{}", p.top, p.bottom, p.left, p.right),
        }
    }
}

impl FromStr for Extent {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "valid" => Ok(Extent::Valid),
            "same" => Ok(Extent::Same),
            "full" => Ok(Extent::Full),
            other => Err(format!(
                "unknown extent '{other}'; expected valid, same or full"
            )),
        }
    }
}

/// Which image axis a size refers to (for messages).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Axis {
    /// Rows (height).
    Rows,
    /// Columns (width).
    Cols,
}

impl fmt::Display for Axis {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Axis::Rows => "height",
            Axis::Cols => "width",
        })
    }
}

/// The geometry of one axis of a sliding-window stage.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct AxisGeometry {
    /// Input samples.
    pub input: usize,
    /// Kernel taps.
    pub kernel: usize,
    /// Stride (≥ 1).
    pub stride: usize,
    /// Dilation (≥ 1).
    pub dilation: usize,
    /// Padding before the first sample.
    pub pad_before: usize,
    /// Padding after the last sample.
    pub pad_after: usize,
    /// Output samples.
    pub output: usize,
}

impl AxisGeometry {
    /// Footprint of the dilated kernel: d·(k − 1) + 1.
    pub fn effective_kernel(&self) -> usize {
        self.dilation * (self.kernel - 1) + 1
    }

    /// Length of the padded input.
    pub fn padded(&self) -> usize {
        self.input + self.pad_before + self.pad_after
    }

    /// Padded samples after the last window that no output sees (the stride's remainder).
    pub fn unused_padded(&self) -> usize {
        let covered = (self.output - 1) * self.stride + self.effective_kernel();
        self.padded() - covered
    }

    /// Real input samples (not padding) at the far edge that no output sees.
    pub fn unused_input(&self) -> usize {
        let covered_end = (self.output - 1) * self.stride + self.effective_kernel();
        let input_end = self.pad_before + self.input;
        input_end.saturating_sub(covered_end.max(self.pad_before))
    }
}

/// The geometry of one kernel over one input size: padding and outputs along
/// each axis.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct KernelGeometry {
    /// Along the rows (height).
    pub rows: AxisGeometry,
    /// Along the columns (width).
    pub cols: AxisGeometry,
}

/// Computes one axis of a stage's geometry; see the module header for the rule.
/// Errors state the sizes involved.
pub fn axis_geometry(
    axis: Axis,
    input: usize,
    kernel: usize,
    stride: usize,
    dilation: usize,
    extent: Extent,
) -> Result<AxisGeometry, Error> {
    if stride == 0 {
        return Err(Error::Shape(format!(
            "stride along the {axis} is 0; it must be at least 1"
        )));
    }
    if dilation == 0 {
        return Err(Error::Shape(format!(
            "dilation along the {axis} is 0; it must be at least 1"
        )));
    }
    if kernel == 0 {
        return Err(Error::Shape(format!("kernel {axis} is 0")));
    }
    if input == 0 {
        return Err(Error::Shape(format!("input {axis} is 0")));
    }
    let k_eff = dilation
        .checked_mul(kernel - 1)
        .and_then(|v| v.checked_add(1))
        .ok_or_else(|| Error::Shape(format!("dilated kernel {axis} overflows")))?;
    let (pad_before, pad_after) = match extent {
        Extent::Valid => (0, 0),
        Extent::Full => (k_eff - 1, k_eff - 1),
        Extent::Same => {
            let out = input.div_ceil(stride);
            // Padded length needed so that `out` windows fit exactly.
            let need = (out - 1) * stride + k_eff;
            let total = need.saturating_sub(input);
            (total / 2, total - total / 2)
        }
        Extent::Explicit(p) => match axis {
            Axis::Rows => (p.top, p.bottom),
            Axis::Cols => (p.left, p.right),
        },
    };
    let padded = input + pad_before + pad_after;
    if k_eff > padded {
        let dil = if dilation > 1 {
            format!(" (a {kernel}-tap kernel with dilation {dilation})")
        } else {
            String::new()
        };
        return Err(Error::Shape(format!(
            "kernel {axis} {k_eff}{dil} is larger than the padded input {axis} {padded} \
             (input {input} + padding {pad_before} + {pad_after})"
        )));
    }
    let output = (padded - k_eff) / stride + 1;
    Ok(AxisGeometry {
        input,
        kernel,
        stride,
        dilation,
        pad_before,
        pad_after,
        output,
    })
}

/// Output size of a window of `window` samples moved by `stride` over `input`
/// samples without padding (pooling uses the same relationship as convolution).
pub fn window_output(
    axis: Axis,
    input: usize,
    window: usize,
    stride: usize,
) -> Result<usize, Error> {
    if window > input {
        return Err(Error::Shape(format!(
            "window {axis} {window} is larger than its input {axis} {input}, so there is nothing to pool"
        )));
    }
    axis_geometry(axis, input, window, stride, 1, Extent::Valid).map(|g| g.output)
}

/// Receptive field of a chain of stages along one axis, tracked as size R,
/// jump J and offset P: an output at index y reads the input samples
/// [y·J − P, y·J − P + R − 1]. A further window stage of footprint k_eff,
/// padding p_before and stride s gives
///
/// ```text
/// R' = R + (k_eff − 1)·J      J' = J·s      P' = P + p_before·J
/// ```
///
/// (Dumoulin & Visin 2016 §2, receptive-field arithmetic; common practice).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReceptiveField {
    /// Input samples one output sees along this axis (R).
    pub size: usize,
    /// Input samples between neighbouring outputs (J).
    pub jump: usize,
    /// Padding before the first input sample, in input samples (P).
    pub offset: usize,
}

impl Default for ReceptiveField {
    fn default() -> Self {
        ReceptiveField {
            size: 1,
            jump: 1,
            offset: 0,
        }
    }
}

impl ReceptiveField {
    /// The field after a further window stage of footprint `k_eff`, padding
    /// `pad_before` and stride `stride`.
    pub fn then(self, k_eff: usize, pad_before: usize, stride: usize) -> Self {
        ReceptiveField {
            size: self.size + (k_eff - 1) * self.jump,
            jump: self.jump * stride,
            offset: self.offset + pad_before * self.jump,
        }
    }

    /// The wider of two fields (the larger size; ties keep `self`).
    pub fn wider(self, other: Self) -> Self {
        if other.size > self.size {
            other
        } else {
            self
        }
    }

    /// The first input sample output `y` reads (negative inside the padding).
    pub fn start(&self, y: usize) -> isize {
        (y * self.jump) as isize - self.offset as isize
    }

    /// How many outputs at the start and at the end of an axis of `input`
    /// samples and `output` outputs read outside the input, so may depend on
    /// the pad mode: ceil(P/J) at the start, and at the end those after the
    /// last output whose field ends inside, floor((input + P − R)/J).
    pub fn outside(&self, input: usize, output: usize) -> (usize, usize) {
        let before = self.offset.div_ceil(self.jump).min(output);
        let last_inside = (input + self.offset)
            .checked_sub(self.size)
            .map(|q| q / self.jump);
        let after = match last_inside {
            Some(q) => output.saturating_sub(q + 1),
            None => output,
        };
        (before, after)
    }
}
