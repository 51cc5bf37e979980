//! Pad modes: what value stands outside the image.
//!
//! Each mode has numpy.pad's documented 1-D meaning (NumPy reference, `numpy.pad`),
//! shown for `[a b c d]` padded by 2 on each side:
//!
//! | mode        | numpy.pad mode | result                  |
//! |-------------|----------------|-------------------------|
//! | `zero`      | `constant` (0) | `0 0 | a b c d | 0 0`   |
//! | `replicate` | `edge`         | `a a | a b c d | d d`   |
//! | `reflect`   | `reflect`      | `c b | a b c d | c b`   |
//! | `symmetric` | `symmetric`    | `b a | a b c d | d c`   |
//! | `wrap`      | `wrap`         | `c d | a b c d | a b`   |
//!
//! Padding wider than the signal keeps folding (`reflect`, period 2(n − 1);
//! `symmetric`, period 2n) or repeating (`wrap`, period n), which is what numpy.pad
//! produces. A 1-sample signal under `reflect` has period 0; numpy.pad repeats the
//! sample, and so do we.
//!
//! Two dimensions pad one axis after the other (numpy.pad does the same), so a
//! corner value is the mapped row of the mapped column.
//!
//! Strategies never test bounds per tap: they ask this module for the source index
//! of each padded row and column once ([`index_map`]) and copy or skip accordingly.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

/// What value stands outside the image.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum PadMode {
    /// The constant 0.
    Zero,
    /// The nearest edge sample.
    Replicate,
    /// Mirror about the edge sample, which is not repeated.
    Reflect,
    /// Mirror about the edge, which is repeated.
    Symmetric,
    /// The image repeats periodically.
    Wrap,
}

impl PadMode {
    /// All modes in a fixed order.
    pub const ALL: [PadMode; 5] = [
        PadMode::Zero,
        PadMode::Replicate,
        PadMode::Reflect,
        PadMode::Symmetric,
        PadMode::Wrap,
    ];

    /// The name used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            PadMode::Zero => "zero",
            PadMode::Replicate => "replicate",
            PadMode::Reflect => "reflect",
            PadMode::Symmetric => "symmetric",
            PadMode::Wrap => "wrap",
        }
    }

    /// Source index for position `i` (which may lie outside `0..n`) of a signal of
    /// length `n > 0`, or `None` where the mode supplies the constant 0.
    pub fn source(self, i: isize, n: usize) -> Option<usize> {
        debug_assert!(n > 0);
        let n_i = n as isize;
        if (0..n_i).contains(&i) {
            return Some(i as usize);
        }
        match self {
            PadMode::Zero => None,
            PadMode::Replicate => Some(if i < 0 { 0 } else { n - 1 }),
            PadMode::Wrap => Some(i.rem_euclid(n_i) as usize),
            PadMode::Reflect => {
                if n == 1 {
                    return Some(0);
                }
                let period = 2 * (n_i - 1);
                let m = i.rem_euclid(period);
                Some(if m < n_i { m } else { period - m } as usize)
            }
            PadMode::Symmetric => {
                let period = 2 * n_i;
                let m = i.rem_euclid(period);
                Some(if m < n_i { m } else { period - 1 - m } as usize)
            }
        }
    }
}

impl fmt::Display for PadMode {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for PadMode {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        PadMode::ALL
            .into_iter()
            .find(|m| m.name() == s)
            .ok_or_else(|| {
                format!(
                    "unknown pad mode '{s}'; expected zero, replicate, reflect, symmetric or wrap"
                )
            })
    }
}

/// Source indices for a padded axis: entry `j` is the input index that padded
/// position `j` copies, or `None` for a zero.
pub fn index_map(mode: PadMode, n: usize, before: usize, after: usize) -> Vec<Option<usize>> {
    (0..n + before + after)
        .map(|j| mode.source(j as isize - before as isize, n))
        .collect()
}

/// Pads a 1-D signal (f64, for tests and tools). The result has length
/// `before + x.len() + after`.
pub fn pad_1d(x: &[f64], mode: PadMode, before: usize, after: usize) -> Vec<f64> {
    index_map(mode, x.len(), before, after)
        .into_iter()
        .map(|s| s.map_or(0.0, |i| x[i]))
        .collect()
}

/// Pads one plane of `h × w` f32 samples (row-major) into `out`, which must hold
/// exactly `(h + top + bottom) × (w + left + right)` samples. Every sample of
/// `out` is written (rows of zero padding with zeros).
pub(crate) fn pad_plane_into(
    plane: &[f32],
    (h, w): (usize, usize),
    mode: PadMode,
    (top, bottom): (usize, usize),
    (left, right): (usize, usize),
    out: &mut [f32],
) {
    pad_rows_into(
        plane,
        (h, w),
        mode,
        top,
        (left, right),
        0..h + top + bottom,
        out,
    );
}

/// Rows `rows` of the padded plane (numbered as in [`pad_plane_into`], `top`
/// rows of padding first) into `out`, one padded row after another: what a
/// band of output rows needs, without padding the whole plane.
pub(crate) fn pad_rows_into(
    plane: &[f32],
    (h, w): (usize, usize),
    mode: PadMode,
    top: usize,
    (left, right): (usize, usize),
    rows: std::ops::Range<usize>,
    out: &mut [f32],
) {
    let pw = w + left + right;
    assert_eq!(out.len(), rows.len() * pw, "padded rows size");
    let cols = index_map(mode, w, left, right);
    for (j, dst) in rows.zip(out.chunks_exact_mut(pw)) {
        let Some(r) = mode.source(j as isize - top as isize, h) else {
            dst.fill(0.0);
            continue;
        };
        let src = &plane[r * w..(r + 1) * w];
        // Interior columns: one contiguous copy.
        dst[left..left + w].copy_from_slice(src);
        for (d, c) in dst[..left].iter_mut().zip(&cols[..left]) {
            *d = c.map_or(0.0, |i| src[i]);
        }
        for (d, c) in dst[left + w..].iter_mut().zip(&cols[left + w..]) {
            *d = c.map_or(0.0, |i| src[i]);
        }
    }
}
