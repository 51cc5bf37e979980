//! Decoded samples to input channels.
//!
//! - `luma` gives one channel with the ITU-R BT.709 weights
//!   Y = 0.2126 R + 0.7152 G + 0.0722 B (BT.709-6, item 3.2), applied to the
//!   stored (gamma-encoded) values as is common practice for luma;
//! - `rgb` gives three channels r, g, b;
//! - `split` gives the image's own channels (r, g, b or grey).
//!
//! Alpha is ignored. Integer samples are divided by the white level
//! ([`crate::image_io::read::ReadOptions::white`]); float samples are kept.

use image::imageops;
use image::metadata::Orientation;
use image::{DynamicImage, ImageBuffer, Luma};
use ndarray::Array3;

use std::path::Path;

use crate::error::Error;
use crate::image_io::loaded::{white_level, ColorMode, ImageMeta, LoadedImage, ReadOptions};

/// BT.709 luma weights for R, G, B (ITU-R BT.709-6, item 3.2).
pub const BT709: [f32; 3] = [0.2126, 0.7152, 0.0722];

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
    }
    .to_string();
    let names = channel_names(opts.color, channels >= 3, &info.color)?;
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
        channel_names: names,
        meta: info,
    })
}

/// The channel names a colour mode gives for an image that is colour or not.
fn channel_names(mode: ColorMode, colour: bool, layout: &str) -> Result<Vec<String>, String> {
    let names: Vec<&str> = match (mode, colour) {
        (ColorMode::Luma, _) => vec!["luma"],
        (ColorMode::Rgb, true) | (ColorMode::Split, true) => vec!["r", "g", "b"],
        (ColorMode::Rgb, false) => {
            return Err(format!(
                "is {layout} but colour mode rgb needs three colour channels; use --color luma or split"
            ))
        }
        (ColorMode::Split, false) => vec!["grey"],
    };
    Ok(names.into_iter().map(String::from).collect())
}

/// Input channels from planes already in units (`C × H × W`; one plane is
/// grey, three are r, g, b, others are channels c0, c1, … for split mode only).
pub(crate) fn from_planes(
    planes: Array3<f32>,
    opts: &ReadOptions,
    info: ImageMeta,
) -> Result<LoadedImage, String> {
    let (c, h, w) = planes.dim();
    let (data, names): (Array3<f32>, Vec<String>) = match (opts.color, c) {
        (ColorMode::Luma, 1) => (planes, vec!["luma".into()]),
        (ColorMode::Luma, 3) => {
            let mut y = Array3::<f32>::zeros((1, h, w));
            ndarray::Zip::from(y.index_axis_mut(ndarray::Axis(0), 0))
                .and(planes.index_axis(ndarray::Axis(0), 0))
                .and(planes.index_axis(ndarray::Axis(0), 1))
                .and(planes.index_axis(ndarray::Axis(0), 2))
                .for_each(|o, &r, &g, &b| *o = BT709[0] * r + BT709[1] * g + BT709[2] * b);
            (y, vec!["luma".into()])
        }
        (ColorMode::Rgb, 3) | (ColorMode::Split, 3) => {
            (planes, vec!["r".into(), "g".into(), "b".into()])
        }
        (ColorMode::Split, 1) => (planes, vec!["grey".into()]),
        (ColorMode::Split, _) => (planes, (0..c).map(|i| format!("c{i}")).collect()),
        (mode, _) => {
            return Err(format!(
                "has {c} channel(s), which colour mode {mode} cannot use; use --color split"
            ));
        }
    };
    Ok(LoadedImage {
        data,
        channel_names: names,
        meta: info,
    })
}

/// Applies an EXIF orientation to every plane of a `C × H × W` array, with the
/// image crate's own rotations and flips (the same as for decoded images).
pub(crate) fn orient_planes(planes: Array3<f32>, o: Orientation) -> Array3<f32> {
    if o == Orientation::NoTransforms {
        return planes;
    }
    let (c, h, w) = planes.dim();
    let mut out = Vec::with_capacity(c * h * w);
    let (mut oh, mut ow) = (h, w);
    for plane in planes.outer_iter() {
        let buf: ImageBuffer<Luma<f32>, Vec<f32>> =
            ImageBuffer::from_raw(w as u32, h as u32, plane.iter().copied().collect())
                .expect("sized from the plane");
        let turned = match o {
            Orientation::NoTransforms => buf,
            Orientation::Rotate90 => imageops::rotate90(&buf),
            Orientation::Rotate180 => imageops::rotate180(&buf),
            Orientation::Rotate270 => imageops::rotate270(&buf),
            Orientation::FlipHorizontal => imageops::flip_horizontal(&buf),
            Orientation::FlipVertical => imageops::flip_vertical(&buf),
            Orientation::Rotate90FlipH => imageops::flip_horizontal(&imageops::rotate90(&buf)),
            Orientation::Rotate270FlipH => imageops::flip_horizontal(&imageops::rotate270(&buf)),
        };
        (oh, ow) = (turned.height() as usize, turned.width() as usize);
        out.extend_from_slice(turned.as_raw());
    }
    Array3::from_shape_vec((c, oh, ow), out).expect("each plane turned alike")
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

/// The orientation to apply for a recorded tag value (`kind`: EXIF or TIFF):
/// none when orientation is ignored; a value outside 1–8 fails the image.
pub(crate) fn orientation_of(
    tag: Option<u16>,
    opts: &ReadOptions,
    path: &Path,
    kind: &str,
) -> Result<Orientation, Error> {
    match tag {
        Some(v) if opts.apply_orientation => {
            Orientation::from_exif(v.min(255) as u8).ok_or_else(|| {
                Error::decode(
                    path,
                    format!(
                        "has {kind} orientation {v}, which is not one of the defined values 1–8; \
                         use --ignore-orientation to read the pixels as stored"
                    ),
                )
            })
        }
        _ => Ok(Orientation::NoTransforms),
    }
}

/// A one-channel image from float samples already in place (used for float
/// TIFF), oriented as `orientation` says.
pub(crate) fn grey_float_image(
    w: u32,
    h: u32,
    samples: Vec<f32>,
    orientation: Orientation,
    opts: &ReadOptions,
    mut info: ImageMeta,
) -> Result<LoadedImage, String> {
    let plane = Array3::from_shape_vec((1, h as usize, w as usize), samples)
        .map_err(|_| "sample count does not match its size".to_string())?;
    let plane = orient_planes(plane, orientation);
    info.orientation_applied = orientation != Orientation::NoTransforms;
    info.bit_depth = info.bit_depth.max(32);
    info.float = true;
    info.color = "grey".into();
    from_planes(plane, opts, info)
}
