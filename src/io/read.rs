//! Reading images into `C × H × W` f32 arrays, with what the file says about itself.
//!
//! - **Units**: integer samples are divided by the white level: the type's full
//!   scale (255, 65535), or a declared `white` (such as 4095 for 12-bit data stored
//!   in 16 bits) where the type can hold it. Float samples are taken as they are.
//!   Bit depth is never reduced: 16-bit samples go to f32 directly.
//! - **Orientation**: the EXIF orientation (or a TIFF's own Orientation tag) is
//!   applied before anything else, so maps line up with what a viewer shows
//!   (EXIF 2.3, JEITA CP-3451C, tag 0x0112: values 1–8). It can be switched off.
//! - **Colour**: `luma` gives one channel with the ITU-R BT.709 weights
//!   Y = 0.2126 R + 0.7152 G + 0.0722 B (BT.709-6, item 3.2), applied to the stored
//!   (gamma-encoded) values as is common practice for luma; `rgb` gives three
//!   channels r, g, b; `split` gives the image's own channels (r, g, b or grey).
//!   Alpha is ignored.
//! - **Content decides the format**, not the extension.

use std::fmt;
use std::io::Read;
use std::path::Path;
use std::str::FromStr;

use image::metadata::Orientation;
use image::{DynamicImage, ImageDecoder, ImageReader, Limits};
use ndarray::Array3;

use crate::error::Error;

/// BT.709 luma weights for R, G, B (ITU-R BT.709-6, item 3.2).
pub const BT709: [f32; 3] = [0.2126, 0.7152, 0.0722];

/// Default `--max-pixels`: 2^28 = 16384 × 16384.
pub const DEFAULT_MAX_PIXELS: u64 = 1 << 28;
/// Default `--max-memory` per image: 4 GiB.
pub const DEFAULT_MAX_MEMORY: u64 = 4 << 30;

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
    /// Refuse images with more pixels than this, before decoding them.
    pub max_pixels: u64,
    /// Bytes one image may take to decode and process.
    pub max_memory: u64,
}

impl Default for ReadOptions {
    fn default() -> Self {
        ReadOptions {
            color: ColorMode::Luma,
            white: None,
            apply_orientation: true,
            max_pixels: DEFAULT_MAX_PIXELS,
            max_memory: DEFAULT_MAX_MEMORY,
        }
    }
}

/// What a file says about itself.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ImageMeta {
    /// Width as stored in the file.
    pub width: u32,
    /// Height as stored in the file.
    pub height: u32,
    /// Bits per sample (8, 16, or 32 for float).
    pub bit_depth: u8,
    /// Float samples.
    pub float: bool,
    /// Colour layout: `grey`, `grey+alpha`, `rgb`, `rgba`.
    pub color: &'static str,
    /// The value that became 1.0 (integer images), or `None` for float.
    pub white: Option<u32>,
    /// EXIF/TIFF orientation value (1–8), where present.
    pub orientation: Option<u16>,
    /// Whether the orientation was applied.
    pub orientation_applied: bool,
    /// EXIF DateTimeOriginal (or DateTime), as written.
    pub captured: Option<String>,
    /// EXIF ExposureTime in seconds, as written (e.g. `1/250`).
    pub exposure: Option<String>,
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
fn white_level(opts: &ReadOptions, full: u32) -> u32 {
    match opts.white {
        Some(w) if w >= 1 && w <= full => w,
        _ => full,
    }
}

fn bad(path: &Path, message: impl Into<String>) -> Error {
    Error::Image {
        path: path.to_path_buf(),
        message: message.into(),
    }
}

/// Reads an image file with the default options (luma, full scale, oriented).
pub fn read_luma(path: &Path) -> Result<LoadedImage, Error> {
    read_image(path, &ReadOptions::default())
}

/// A decoder's error in plain words: files cut short and damaged checksums are
/// named as such, with the decoder's own words after them.
fn decode_message(e: &image::ImageError) -> String {
    let eof = matches!(e, image::ImageError::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof);
    plain_decode_error(&e.to_string(), eof)
}

/// [`decode_message`] from a decoder's message text.
pub(crate) fn plain_decode_error(text: &str, eof: bool) -> String {
    let lower = text.to_ascii_lowercase();
    let cut = eof
        || [
            "end of file",
            "fill whole buffer",
            "not enough bytes",
            "unexpected eof",
            "truncated",
        ]
        .iter()
        .any(|w| lower.contains(w));
    let detail = text.split_whitespace().collect::<Vec<_>>().join(" ");
    let detail = detail.trim_end_matches('.');
    if cut {
        format!("is truncated: the file ends before its image data does (decoder: {detail})")
    } else if lower.contains("crc") || lower.contains("checksum") {
        format!("is damaged: a checksum does not match its data (decoder: {detail})")
    } else {
        format!("cannot decode: {detail}")
    }
}

/// Checks that a JPEG file runs to its end-of-image marker: the JPEG decoder
/// fills a stream that stops early with grey and reports nothing, so a capture
/// cut short in transfer would otherwise give maps of made-up pixels. Walks the
/// marker segments and entropy-coded data as ITU-T T.81 §B.1 lays them out
/// (written here: no crate offers a check without a full decode).
fn jpeg_complete(path: &Path) -> Result<(), Error> {
    let data = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    jpeg_ends_whole(&data).map_err(|m| bad(path, m))
}

/// See [`jpeg_complete`]; `data` is the whole file.
fn jpeg_ends_whole(data: &[u8]) -> Result<(), String> {
    let cut = || "is truncated: the JPEG data stops before its end-of-image marker".to_string();
    let mut i = 2; // SOI was checked by the format sniffing.
    let mut in_scan = false;
    loop {
        if in_scan {
            // Entropy-coded data: skip to the next 0xFF.
            i += data
                .get(i..)
                .and_then(|d| d.iter().position(|&b| b == 0xFF))
                .ok_or_else(cut)?;
        }
        if *data.get(i).ok_or_else(cut)? != 0xFF {
            return Err("is damaged: a JPEG marker is missing where one must be".into());
        }
        // Fill bytes (0xFF) may precede a marker.
        while data.get(i) == Some(&0xFF) {
            i += 1;
        }
        let m = *data.get(i).ok_or_else(cut)?;
        i += 1;
        match m {
            0x00 | 0xD0..=0xD7 if in_scan => {} // stuffed byte, restart marker
            0xD9 => return Ok(()),
            0x01 | 0xD0..=0xD7 => {}
            _ => {
                let len = data.get(i..i + 2).ok_or_else(cut)?;
                let len = u16::from_be_bytes([len[0], len[1]]) as usize;
                i += len;
                if i > data.len() {
                    return Err(cut());
                }
                in_scan = m == 0xDA;
            }
        }
    }
}

/// A byte count for messages: `512 B`, `3.4 KiB`, `12.0 MiB`, `4.0 GiB`.
pub fn bytes_text(n: u64) -> String {
    const UNITS: [&str; 4] = ["KiB", "MiB", "GiB", "TiB"];
    if n < 1024 {
        return format!("{n} B");
    }
    let mut v = n as f64 / 1024.0;
    let mut u = 0;
    while v >= 1024.0 && u < UNITS.len() - 1 {
        v /= 1024.0;
        u += 1;
    }
    format!("{v:.1} {}", UNITS[u])
}

/// Checks the bytes decoding an image would take against `--max-memory`.
fn check_decode_memory(need: u64, opts: &ReadOptions) -> Result<(), String> {
    if need > opts.max_memory {
        return Err(format!(
            "needs about {} to decode, over --max-memory ({})",
            bytes_text(need),
            bytes_text(opts.max_memory)
        ));
    }
    Ok(())
}

/// Checks an image's size against `--max-pixels` before it is decoded.
pub fn check_pixels(w: u64, h: u64, opts: &ReadOptions) -> Result<(), String> {
    let px = w.saturating_mul(h);
    if px > opts.max_pixels {
        return Err(format!(
            "is {w}×{h} = {px} pixels, over the limit of {} pixels (--max-pixels)",
            opts.max_pixels
        ));
    }
    Ok(())
}

/// Reads an image file (see the module header for units, orientation, colour).
/// Images with samples that are not finite (NaN, ±infinity) are refused: no
/// convolution result near them would mean anything.
pub fn read_image(path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let img = read_image_any(path, opts)?;
    let bad_samples = img.data.iter().filter(|v| !v.is_finite()).count();
    if bad_samples > 0 {
        return Err(bad(
            path,
            format!(
                "has {bad_samples} sample(s) that are not finite (NaN or infinite); \
                 replace them before filtering"
            ),
        ));
    }
    Ok(img)
}

/// An error opening an input, in plain words for the cases a batch meets: a
/// broken symbolic link, a file that went away after it was listed.
pub fn explain_open_error(path: &Path, e: std::io::Error) -> Error {
    match (
        e.kind(),
        std::fs::symlink_metadata(path),
        std::fs::read_link(path),
    ) {
        (std::io::ErrorKind::NotFound, Ok(m), Ok(target)) if m.file_type().is_symlink() => bad(
            path,
            format!(
                "is a symbolic link to {}, which does not exist",
                target.display()
            ),
        ),
        (std::io::ErrorKind::NotFound, Err(_), _) => bad(
            path,
            "is gone: it was listed but no longer exists (moved or deleted during the run?)",
        ),
        _ => Error::io(path, e),
    }
}

fn read_image_any(path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let meta = std::fs::metadata(path).map_err(|e| explain_open_error(path, e))?;
    if meta.is_dir() {
        return Err(bad(path, "is a folder, not an image file"));
    }
    if meta.len() == 0 {
        return Err(bad(path, "is empty (0 bytes)"));
    }
    // Trust the content, not the extension: a text file named .png is "not an
    // image", a PNG named .tif still reads.
    let mut head = [0u8; 64];
    let mut n = 0;
    {
        let mut f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
        while n < head.len() {
            match f.read(&mut head[n..]).map_err(|e| Error::io(path, e))? {
                0 => break,
                k => n += k,
            }
        }
    }
    if head[..n].starts_with(b"\x93NUMPY") {
        return read_npy_image(path, opts, meta.len());
    }
    let format = image::guess_format(&head[..n]).map_err(|_| {
        bad(path, "is not an image: its first bytes match no format tapmap reads (PNG, JPEG, TIFF, BMP, PNM)")
    })?;
    if format == image::ImageFormat::Jpeg {
        jpeg_complete(path)?;
    }
    let mut reader = ImageReader::open(path).map_err(|e| Error::io(path, e))?;
    reader.set_format(format);
    // Sizes are checked here against --max-pixels with a plain message; the
    // decoder's own limit caps what it may allocate.
    let mut limits = Limits::default();
    limits.max_image_width = None;
    limits.max_image_height = None;
    limits.max_alloc = Some(opts.max_memory);
    reader.limits(limits);
    let mut decoder = match reader.into_decoder() {
        Ok(d) => d,
        Err(image::ImageError::Unsupported(_)) if format == image::ImageFormat::Tiff => {
            return read_grey_float(path, opts);
        }
        Err(image::ImageError::Limits(e)) => {
            return Err(bad(
                path,
                format!("is too large to decode within --max-memory ({e})"),
            ))
        }
        Err(e) => return Err(bad(path, decode_message(&e))),
    };
    let (w, h) = decoder.dimensions();
    check_pixels(w as u64, h as u64, opts).map_err(|m| bad(path, m))?;
    // Decoded samples plus the f32 planes made from them.
    let need = decoder
        .total_bytes()
        .saturating_add((w as u64 * h as u64).saturating_mul(16));
    check_decode_memory(need, opts).map_err(|m| bad(path, m))?;
    let mut info = ImageMeta::default();
    let exif_raw = decoder
        .exif_metadata()
        .map_err(|e| bad(path, format!("cannot read its metadata: {e}")))?;
    if let Some(raw) = exif_raw.as_deref() {
        // An EXIF block that does not parse leaves the orientation unknown: that
        // fails the image, unless orientation is ignored anyway.
        if let Err(m) = read_exif(raw, &mut info) {
            if opts.apply_orientation {
                return Err(bad(path, m));
            }
        }
    }
    if info.orientation.is_none() {
        // TIFF keeps orientation in its own tag rather than an EXIF block.
        let o = decoder
            .orientation()
            .map_err(|e| bad(path, format!("cannot read its orientation: {e}")))?;
        if o != Orientation::NoTransforms {
            info.orientation = Some(o.to_exif() as u16);
        }
    }
    let orientation = match info.orientation {
        Some(v) => Orientation::from_exif(v.min(255) as u8).ok_or_else(|| {
            bad(
                path,
                format!(
                    "has EXIF orientation {v}, which is not one of the defined values 1–8; \
                     use --ignore-orientation to read the pixels as stored"
                ),
            )
        }),
        None => Ok(Orientation::NoTransforms),
    };
    let orientation = match (orientation, opts.apply_orientation) {
        (Ok(o), _) => o,
        (Err(_), false) => Orientation::NoTransforms,
        (Err(e), true) => return Err(e),
    };
    let mut img = DynamicImage::from_decoder(decoder).map_err(|e| bad(path, decode_message(&e)))?;
    if img.width() == 0 || img.height() == 0 {
        return Err(bad(path, "has zero width or height"));
    }
    info.width = img.width();
    info.height = img.height();
    if opts.apply_orientation {
        img.apply_orientation(orientation);
        info.orientation_applied = orientation != Orientation::NoTransforms;
    }
    convert(&img, opts, info).map_err(|m| bad(path, m))
}

/// A NumPy `.npy` array as an image: H×W or C×H×W, uint8, uint16, float32 or
/// float64 (either byte order, C or Fortran order). Integers are divided by the
/// white level as for image files; floats are taken as they are. One channel is
/// grey, three are r, g, b; other counts are channels c0, c1, … (split mode
/// only). Arrays carry no orientation.
fn read_npy_image(path: &Path, opts: &ReadOptions, size: u64) -> Result<LoadedImage, Error> {
    if size.saturating_mul(2) > opts.max_memory {
        return Err(bad(
            path,
            format!(
                "is {}, too large to read within --max-memory ({})",
                bytes_text(size),
                bytes_text(opts.max_memory)
            ),
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    let crate::kernel::tensors::NpyArray {
        shape,
        mut data,
        full_scale: full,
    } = crate::kernel::tensors::npy_array(&bytes).map_err(|m| bad(path, m))?;
    let (c, h, w) = match shape.as_slice() {
        [h, w] => (1, *h, *w),
        [c, h, w] => (*c, *h, *w),
        s => {
            return Err(bad(
                path,
                format!("is an array of shape {s:?}; images are H×W or C×H×W"),
            ))
        }
    };
    if c == 0 || h == 0 || w == 0 {
        return Err(bad(path, format!("has a zero-sized dimension {shape:?}")));
    }
    check_pixels(w as u64, h as u64, opts).map_err(|m| bad(path, m))?;
    let mut info = ImageMeta {
        width: w as u32,
        height: h as u32,
        ..ImageMeta::default()
    };
    match full {
        Some(f) => {
            let wl = white_level(opts, f);
            info.white = Some(wl);
            info.bit_depth = if f == 255 { 8 } else { 16 };
            data.iter_mut().for_each(|v| *v /= wl as f32);
        }
        None => {
            info.float = true;
            info.bit_depth = 32;
        }
    }
    info.color = match c {
        1 => "grey",
        3 => "rgb",
        _ => "array",
    };
    let plane = h * w;
    let (data, names): (Vec<f32>, Vec<String>) = match (opts.color, c) {
        (ColorMode::Luma, 1) => (data, vec!["luma".into()]),
        (ColorMode::Luma, 3) => (
            (0..plane)
                .map(|i| {
                    BT709[0] * data[i] + BT709[1] * data[plane + i] + BT709[2] * data[2 * plane + i]
                })
                .collect(),
            vec!["luma".into()],
        ),
        (ColorMode::Rgb, 3) | (ColorMode::Split, 3) => {
            (data, vec!["r".into(), "g".into(), "b".into()])
        }
        (ColorMode::Split, 1) => (data, vec!["grey".into()]),
        (ColorMode::Split, _) => (data, (0..c).map(|i| format!("c{i}")).collect()),
        (mode, _) => {
            return Err(bad(
                path,
                format!(
                    "has {c} channel(s), which colour mode {mode} cannot use; use --color split"
                ),
            ));
        }
    };
    let n = names.len();
    let data = Array3::from_shape_vec((n, h, w), data).map_err(|e| bad(path, e.to_string()))?;
    Ok(LoadedImage {
        data,
        channel_names: names,
        meta: info,
    })
}

/// One-channel float TIFF, which the image crate does not read: decoded with the
/// `tiff` crate, carried through the same orientation code as an RGB float image
/// with equal channels, then taken back to one channel.
fn read_grey_float(path: &Path, opts: &ReadOptions) -> Result<LoadedImage, Error> {
    let (w, h, samples, tag) = crate::io::tiff::read_grey_float_tiff(path, &|w, h| {
        check_pixels(w as u64, h as u64, opts)?;
        // Samples as f64 at worst, then three f32 copies while orienting.
        check_decode_memory((w as u64 * h as u64).saturating_mul(20), opts)
    })
    .map_err(|m| bad(path, m))?;
    let mut info = ImageMeta {
        width: w,
        height: h,
        orientation: tag,
        ..ImageMeta::default()
    };
    let orientation = match tag {
        Some(v) if opts.apply_orientation => Orientation::from_exif(v.min(255) as u8).ok_or_else(|| {
            bad(path, format!("has TIFF orientation {v}, which is not one of the defined values 1–8; use --ignore-orientation"))
        })?,
        _ => Orientation::NoTransforms,
    };
    let rgb: Vec<f32> = samples.iter().flat_map(|v| [*v, *v, *v]).collect();
    let buf = image::Rgb32FImage::from_raw(w, h, rgb)
        .ok_or_else(|| bad(path, "sample count does not match its size"))?;
    let mut img = DynamicImage::ImageRgb32F(buf);
    img.apply_orientation(orientation);
    info.orientation_applied = orientation != Orientation::NoTransforms;
    let (ow, oh) = (img.width() as usize, img.height() as usize);
    let grey: Vec<f32> = img
        .as_flat_samples_f32()
        .expect("rgb f32")
        .samples
        .iter()
        .step_by(3)
        .copied()
        .collect();
    let name = match opts.color {
        ColorMode::Luma => "luma",
        ColorMode::Split => "grey",
        ColorMode::Rgb => return Err(bad(
            path,
            "is grey but colour mode rgb needs three colour channels; use --color luma or split",
        )),
    };
    info.bit_depth = 32;
    info.float = true;
    info.color = "grey";
    let data = Array3::from_shape_vec((1, oh, ow), grey).map_err(|e| bad(path, e.to_string()))?;
    Ok(LoadedImage {
        data,
        channel_names: vec![name.to_string()],
        meta: info,
    })
}

/// Fills orientation, capture time and exposure from a raw EXIF block
/// (TIFF structure, with or without the `Exif\0\0` prefix).
fn read_exif(raw: &[u8], info: &mut ImageMeta) -> Result<(), String> {
    let body = raw.strip_prefix(b"Exif\0\0").unwrap_or(raw);
    let exif = exif::Reader::new().read_raw(body.to_vec()).map_err(|e| {
        format!("has an EXIF block that does not parse ({e}); use --ignore-orientation to skip it")
    })?;
    let field = |tag| exif.get_field(tag, exif::In::PRIMARY);
    if let Some(f) = field(exif::Tag::Orientation) {
        info.orientation = Some(
            f.value
                .get_uint(0)
                .map_or(0, |v| v.min(u16::MAX as u32) as u16),
        );
    }
    let text = |tag| {
        field(tag).map(|f| match &f.value {
            exif::Value::Ascii(v) => v
                .first()
                .map(|s| String::from_utf8_lossy(s).trim().to_string())
                .unwrap_or_default(),
            other => other.display_as(tag).to_string(),
        })
    };
    info.captured = text(exif::Tag::DateTimeOriginal).or_else(|| text(exif::Tag::DateTime));
    info.exposure = field(exif::Tag::ExposureTime).and_then(|f| match &f.value {
        exif::Value::Rational(v) => v.first().map(|r| format!("{}/{}", r.num, r.denom)),
        _ => None,
    });
    Ok(())
}

/// Converts a decoded image to channels (see the module header for the rules).
pub fn convert(
    img: &DynamicImage,
    opts: &ReadOptions,
    mut info: ImageMeta,
) -> Result<LoadedImage, String> {
    let (w, h) = (img.width() as usize, img.height() as usize);
    let color = img.color();
    let channels = color.channel_count() as usize;
    info.bit_depth = (color.bits_per_pixel() / color.channel_count() as u16) as u8;
    info.color = match channels {
        1 => "grey",
        2 => "grey+alpha",
        3 => "rgb",
        _ => "rgba",
    };
    let colour = channels >= 3;
    let names: Vec<&str> = match (opts.color, colour) {
        (ColorMode::Luma, _) => vec!["luma"],
        (ColorMode::Rgb, true) | (ColorMode::Split, true) => vec!["r", "g", "b"],
        (ColorMode::Rgb, false) => {
            return Err(format!(
                "is {} but colour mode rgb needs three colour channels; use --color luma or split",
                info.color
            ))
        }
        (ColorMode::Split, false) => vec!["grey"],
    };
    let out_c = names.len();
    let mut data = vec![0.0f32; out_c * w * h];
    if let Some(s) = img.as_flat_samples_u8() {
        let wl = white_level(opts, 255);
        info.white = Some(wl);
        fill(&mut data, (w * h, channels, out_c), s.samples, |v| {
            v as f32 / wl as f32
        });
    } else if let Some(s) = img.as_flat_samples_u16() {
        let wl = white_level(opts, 65535);
        info.white = Some(wl);
        fill(&mut data, (w * h, channels, out_c), s.samples, |v| {
            v as f32 / wl as f32
        });
    } else if let Some(s) = img.as_flat_samples_f32() {
        info.float = true;
        fill(&mut data, (w * h, channels, out_c), s.samples, |v| v);
    } else {
        return Err(format!(
            "has a sample layout tapmap does not handle ({color:?})"
        ));
    }
    let data = Array3::from_shape_vec((out_c, h, w), data).map_err(|e| e.to_string())?;
    Ok(LoadedImage {
        data,
        channel_names: names.into_iter().map(String::from).collect(),
        meta: info,
    })
}

/// Writes `out_c` planes of `n` pixels from interleaved samples with `channels`
/// per pixel: luma for one plane from colour, the first sample for one plane
/// from grey, r, g, b for three planes.
fn fill<T: Copy>(
    data: &mut [f32],
    (n, channels, out_c): (usize, usize, usize),
    samples: &[T],
    unit: impl Fn(T) -> f32,
) {
    let px = samples.chunks_exact(channels).take(n);
    match (out_c, channels >= 3) {
        (1, true) => data.iter_mut().zip(px).for_each(|(d, p)| {
            *d = BT709[0] * unit(p[0]) + BT709[1] * unit(p[1]) + BT709[2] * unit(p[2])
        }),
        (1, false) => data.iter_mut().zip(px).for_each(|(d, p)| *d = unit(p[0])),
        _ => {
            for (i, p) in px.enumerate() {
                for c in 0..3 {
                    data[c * n + i] = unit(p[c]);
                }
            }
        }
    }
}
