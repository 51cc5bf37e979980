//! What reading an image gives: its channels as f32 planes with their names,
//! what the file said about itself, and the options that decide how it is read.

use std::fmt;
use std::str::FromStr;

use ndarray::Array3;

use crate::limits::Limits;

/// How colour images become input channels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ColorMode {
    /// One channel: BT.709 luma (grey images as they are).
    #[default]
    Luma,
    /// Three channels r, g, b, for banks whose kernels have three planes.
    Rgb,
    /// The image's own channels; every kernel runs over each (maps `kernel@channel`).
    Split,
}

impl ColorMode {
    /// Name on the command line and in recipes.
    pub fn name(self) -> &'static str {
        match self {
            ColorMode::Luma => "luma",
            ColorMode::Rgb => "rgb",
            ColorMode::Split => "split",
        }
    }

    /// Input channels a bank must take in this mode (split: one-plane kernels).
    pub fn bank_channels(self) -> usize {
        match self {
            ColorMode::Rgb => 3,
            ColorMode::Luma | ColorMode::Split => 1,
        }
    }
}

impl fmt::Display for ColorMode {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for ColorMode {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "luma" => Ok(ColorMode::Luma),
            "rgb" => Ok(ColorMode::Rgb),
            "split" => Ok(ColorMode::Split),
            o => Err(format!(
                "unknown colour mode '{o}'; expected luma, rgb or split"
            )),
        }
    }
}

/// How to read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReadOptions {
    /// Channel handling.
    pub color: ColorMode,
    /// Declared white level for integer samples (used where the type can hold it).
    pub white: Option<u32>,
    /// Apply the EXIF/TIFF orientation.
    pub apply_orientation: bool,
    /// Pixel and memory limits per image.
    pub limits: Limits,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions {
            color: ColorMode::Luma,
            white: None,
            apply_orientation: true,
            limits: Limits::default(),
        }
    }
}

/// What a file says about itself.
#[derive(Debug, Clone, PartialEq, Default, serde::Serialize, serde::Deserialize)]
pub struct ImageMeta {
    /// Width as stored in the file.
    pub width: u32,
    /// Height as stored in the file.
    pub height: u32,
    /// Bits per sample as stored (8, 16, 32 or 64).
    pub bit_depth: u8,
    /// Float samples.
    pub float: bool,
    /// Colour layout: `grey`, `grey+alpha`, `rgb`, `rgba`, `array`.
    pub color: String,
    /// The value that became 1.0 (integer images), or `None` for float.
    pub white: Option<u32>,
    /// EXIF/TIFF orientation value (1–8), where present.
    pub orientation: Option<u16>,
    /// Whether the orientation was applied.
    pub orientation_applied: bool,
    /// EXIF DateTimeOriginal (or DateTime) in ISO 8601 (`2026-11-30T22:14:05`,
    /// with its offset when the file records one), or as written when it is
    /// not a date the EXIF standard allows.
    pub captured: Option<String>,
    /// EXIF ExposureTime in seconds (1/250 is 0.004).
    pub exposure: Option<f64>,
}

/// A decoded image ready for a recipe.
#[derive(Debug, Clone)]
pub struct LoadedImage {
    /// `C × H × W` samples, after orientation.
    pub data: Array3<f32>,
    /// Name of each channel (`luma`, `grey`, `r`, `g`, `b`).
    pub channel_names: Vec<String>,
    /// What the file said.
    pub meta: ImageMeta,
}

/// The value that becomes 1.0 for integer samples whose type's full scale is
/// `full`: the declared `--white` where the type can hold it, else `full`.
pub(crate) fn white_level(opts: &ReadOptions, full: u32) -> u32 {
    match opts.white {
        Some(w) if w >= 1 && w <= full => w,
        _ => full,
    }
}
