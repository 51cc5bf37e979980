//! What the border study writes: `borders.csv` (error by distance from the edge),
//! `bands.csv` (measured and predicted band per edge), `summary.csv` and the
//! stdout table, difference views with the band outlined, and plots of error
//! against distance, one line per mode.

use std::fmt::Write as _;
use std::path::Path;

use image::{GrayImage, Luma, Rgb, RgbImage};
use plotters::prelude::*;

use crate::border::PadMode;
use crate::error::Error;
use crate::jobs::borders::{ChannelStudy, DistanceStat, ImageStudy};
use crate::jobs::tables::number;
use crate::render::sheet::draw_text;
use crate::render::view::ViewImage;
use crate::render::{write_png, write_view, ViewPng};

/// Colour and dash of each mode's line in plots; tapmap's own choice.
pub fn mode_style(m: PadMode) -> ([u8; 3], bool) {
    match m {
        PadMode::Zero => ([70, 70, 78], false),
        PadMode::Replicate => ([22, 108, 128], false),
        PadMode::Reflect => ([176, 86, 24], true),
        PadMode::Symmetric => ([120, 64, 150], false),
        PadMode::Wrap => ([96, 128, 24], true),
    }
}

/// One row of the per-image summary.
#[derive(Debug, Clone, PartialEq)]
pub struct ModeSummary {
    /// The mode.
    pub mode: PadMode,
    /// Its band (largest over channels and edges), output pixels.
    pub band: usize,
    /// Mean deviation from the median inside the band, averaged over channels.
    pub mean_dev: f64,
    /// Largest deviation from the median.
    pub max_dev: f64,
    /// Crop study: mean error against the truth inside the predicted band.
    pub crop_mean: Option<f64>,
    /// Crop study: largest error against the truth.
    pub crop_max: Option<f64>,
}

fn inside(v: &[DistanceStat], limit: usize) -> (f64, f64) {
    let (mut sum, mut n, mut max) = (0.0, 0usize, 0.0f64);
    for s in v.iter().take(limit) {
        sum += s.sum;
        n += s.count;
        max = max.max(s.max);
    }
    (if n == 0 { 0.0 } else { sum / n as f64 }, max)
}

/// The per-mode summary of one image.
pub fn summarise(st: &ImageStudy) -> Vec<ModeSummary> {
    let modes: Vec<PadMode> = st
        .channels
        .first()
        .map(|c| c.modes.iter().map(|m| m.0).collect())
        .unwrap_or_default();
    modes
        .iter()
        .enumerate()
        .map(|(i, &mode)| {
            let (mut band, mut mean, mut max) = (0usize, 0.0, 0.0f64);
            let (mut cmean, mut cmax) = (0.0, 0.0f64);
            for ch in &st.channels {
                let limit = ch.band.iter().copied().max().unwrap_or(0);
                let (m, x) = inside(&ch.modes[i].2, limit);
                band = band.max(ch.modes[i].1);
                mean += m;
                max = max.max(x);
                if let Some((_, v)) = ch.crop.get(i) {
                    let plimit = ch.predicted.iter().copied().max().unwrap_or(0).max(1);
                    let (m, x) = inside(v, plimit);
                    cmean += m;
                    cmax = cmax.max(x);
                }
            }
            let n = st.channels.len().max(1) as f64;
            let has_crop = st.channels.first().is_some_and(|c| !c.crop.is_empty());
            ModeSummary {
                mode,
                band,
                mean_dev: mean / n,
                max_dev: max,
                crop_mean: has_crop.then_some(cmean / n),
                crop_max: has_crop.then_some(cmax),
            }
        })
        .collect()
}

/// The best modes: lowest crop error when there is a crop study, else lowest
/// deviation from the median. Every mode that ties for lowest is returned (in
/// the order given), so a tie is shown, never hidden.
pub fn best(summary: &[ModeSummary]) -> Vec<usize> {
    let key = |s: &ModeSummary| s.crop_mean.unwrap_or(s.mean_dev);
    let Some(low) = summary.iter().map(key).min_by(f64::total_cmp) else {
        return Vec::new();
    };
    (0..summary.len())
        .filter(|&i| key(&summary[i]).total_cmp(&low).is_eq())
        .collect()
}

/// The stdout table for one image.
pub fn summary_text(path: &str, st: &ImageStudy, summary: &[ModeSummary]) -> String {
    let mut s = String::new();
    let predicted = st
        .channels
        .iter()
        .flat_map(|c| c.predicted)
        .max()
        .unwrap_or(0);
    let measured = st.channels.iter().flat_map(|c| c.band).max().unwrap_or(0);
    let _ = writeln!(
        s,
        "{path}: {} channel(s), band {measured} px measured, {predicted} px predicted by the receptive field",
        st.shape.0
    );
    let crop = summary.first().is_some_and(|m| m.crop_mean.is_some());
    let _ = write!(
        s,
        "  {:<10} {:>5} {:>12} {:>12}",
        "mode", "band", "mean dev", "max dev"
    );
    if crop {
        let _ = write!(s, " {:>12} {:>12}", "crop mean", "crop max");
    }
    s.push('\n');
    let b = best(summary);
    for (i, m) in summary.iter().enumerate() {
        let _ = write!(
            s,
            "  {:<10} {:>5} {:>12.5e} {:>12.5e}",
            m.mode.name(),
            m.band,
            m.mean_dev,
            m.max_dev
        );
        if let (Some(a), Some(x)) = (m.crop_mean, m.crop_max) {
            let _ = write!(s, " {a:>12.5e} {x:>12.5e}");
        }
        if b.contains(&i) {
            s.push_str(if crop {
                "  <- closest to the real surroundings"
            } else {
                "  <- closest to the consensus"
            });
            if b.len() > 1 {
                s.push_str(" (tied)");
            }
        }
        s.push('\n');
    }
    if st.crop_truth_clean == Some(false) {
        s.push_str("  note: the crop is narrower than the predicted band, so the truth itself was touched by padding\n");
    }
    s
}

/// Rows of `borders.csv` for one image.
pub fn borders_rows(path: &str, st: &ImageStudy, out: &mut Vec<Vec<String>>) {
    for (k, ch) in st.channels.iter().enumerate() {
        let limit = report_limit(ch);
        let mut push = |study: &str, mode: PadMode, v: &[DistanceStat]| {
            for (d, s) in v.iter().enumerate().take(limit) {
                out.push(vec![
                    path.to_string(),
                    study.to_string(),
                    k.to_string(),
                    ch.name.clone(),
                    mode.name().to_string(),
                    d.to_string(),
                    number(s.mean()),
                    number(s.max),
                    s.count.to_string(),
                ]);
            }
        };
        for (m, _, v) in &ch.modes {
            push("modes", *m, v);
        }
        for (m, v) in &ch.crop {
            push("crop", *m, v);
        }
    }
}

/// Distances reported: a few beyond the wider of the measured and predicted bands.
fn report_limit(ch: &ChannelStudy) -> usize {
    let b = ch
        .band
        .iter()
        .chain(&ch.predicted)
        .copied()
        .max()
        .unwrap_or(0);
    b + 3
}

/// Rows of `bands.csv` for one image.
pub fn band_rows(path: &str, st: &ImageStudy, out: &mut Vec<Vec<String>>) {
    for (k, ch) in st.channels.iter().enumerate() {
        for (e, edge) in ["top", "bottom", "left", "right"].iter().enumerate() {
            out.push(vec![
                path.to_string(),
                k.to_string(),
                ch.name.clone(),
                edge.to_string(),
                ch.band[e].to_string(),
                ch.predicted[e].to_string(),
            ]);
        }
    }
}

/// Grey levels of difference views; the two levels above are the outline colours.
const GREYS: u8 = 253;
/// Palette index of the measured band's outline (amber).
const MEASURED: u8 = 254;
/// Palette index of the predicted band's outline (cyan).
const PREDICTED: u8 = 255;

/// The difference views' palette: grey 0–253 (black to white), then amber and
/// cyan for the outlines.
fn palette() -> Vec<[u8; 3]> {
    let mut p: Vec<[u8; 3]> = (0..=GREYS as u32)
        .map(|i| {
            let v = (i * 255 / GREYS as u32) as u8;
            [v, v, v]
        })
        .collect();
    p.push([230, 150, 40]);
    p.push([40, 170, 190]);
    p
}

fn outline(img: &mut GrayImage, inset: [usize; 4], colour: u8) {
    let (w, h) = (img.width() as usize, img.height() as usize);
    let [t, b, l, r] = inset;
    if t + b >= h || l + r >= w || inset == [0; 4] {
        return;
    }
    let (y0, y1, x0, x1) = (t, h - 1 - b, l, w - 1 - r);
    for x in x0..=x1 {
        img.put_pixel(x as u32, y0 as u32, Luma([colour]));
        img.put_pixel(x as u32, y1 as u32, Luma([colour]));
    }
    for y in y0..=y1 {
        img.put_pixel(x0 as u32, y as u32, Luma([colour]));
        img.put_pixel(x1 as u32, y as u32, Luma([colour]));
    }
}

/// Difference views of one image: per channel and mode, |Y_mode − median| in
/// grey (0 black, the channel's largest deviation over all modes white; 254
/// levels), the measured band outlined in amber and the predicted band in cyan,
/// as indexed PNG. Off the ring the modes agree, so the view is black there.
/// Channels and modes are drawn in parallel. Returns the files written.
pub fn write_difference_views(
    dir: &Path,
    st: &ImageStudy,
    modes: &[PadMode],
) -> Result<usize, Error> {
    use rayon::prelude::*;
    let (oc, oh, ow) = st.shape;
    let table = palette();
    let jobs: Vec<(usize, usize)> = (0..oc)
        .flat_map(|k| (0..modes.len()).map(move |i| (k, i)))
        .collect();
    let hi: Vec<f32> = (0..oc)
        .map(|k| {
            let hi = st
                .maps
                .iter()
                .flat_map(|m| {
                    m.positions()
                        .map(move |(y, x)| (m.get(k, y, x) - st.median.get(k, y, x)).abs())
                })
                .filter(|v| v.is_finite())
                .fold(0.0f32, f32::max);
            if hi > 0.0 {
                hi
            } else {
                1.0
            }
        })
        .collect();
    jobs.par_iter()
        .try_for_each(|&(k, i)| -> Result<(), Error> {
            let ch = &st.channels[k];
            let map = &st.maps[i];
            let mut img = GrayImage::new(ow as u32, oh as u32);
            for (y, x) in map.positions() {
                let d = (map.get(k, y, x) - st.median.get(k, y, x)).abs();
                let v = ((d / hi[k]).clamp(0.0, 1.0) * GREYS as f32).round() as u8;
                img.put_pixel(x as u32, y as u32, Luma([v]));
            }
            outline(&mut img, ch.predicted, PREDICTED);
            outline(&mut img, ch.band, MEASURED);
            let img = with_caption(img, k, ch, modes[i], hi[k]);
            let sub = dir.join(format!("{k:02}-{}", crate::jobs::safe_name(&ch.name)));
            let p = sub.join(format!("{}.png", modes[i].name()));
            write_view(&p, &ViewImage::Indexed(img), &table, ViewPng::Fast)
        })?;
    Ok(jobs.len())
}

/// A difference view with two lines under it saying what it shows (the
/// channel, the mode and the grey scale's range, and which outline is which)
/// and the grey scale as a bar.
/// Drawn in the view's own palette (text in its greys, swatches in the
/// outline colours).
fn with_caption(map: GrayImage, k: usize, ch: &ChannelStudy, mode: PadMode, hi: f32) -> GrayImage {
    use crate::render::text::{draw_text, text_width, LINE};
    let first = format!(
        "channel {k:02} {}, mode {}: |mode - median of modes|, black 0 to white {}",
        ch.name,
        mode.name(),
        crate::render::sheet::short_number(f64::from(hi))
    );
    let measured = format!(
        "measured band {} px",
        ch.band.iter().max().copied().unwrap_or(0)
    );
    let predicted = format!(
        "predicted band {} px (receptive field)",
        ch.predicted.iter().max().copied().unwrap_or(0)
    );
    let width = map
        .width()
        .max(6 + text_width(&first))
        .max(40 + text_width(&measured) + text_width(&predicted));
    let height = map.height() + 6 + 2 * LINE + 12;
    // The text is drawn in colour on a strip as wide as the picture and only
    // as tall as the caption, then taken into the view's greys.
    let mut text = RgbImage::new(width, height - map.height());
    let ink = Rgb([255, 255, 255]);
    let y0 = map.height() + 3;
    draw_text(&mut text, 4, 3, &first, ink);
    draw_text(&mut text, 18, 3 + LINE, &measured, ink);
    let x2 = 18 + text_width(&measured) + 22;
    draw_text(&mut text, x2, 3 + LINE, &predicted, ink);
    let mut out = GrayImage::new(width, height);
    image::imageops::replace(&mut out, &map, 0, 0);
    for (x, y, p) in text.enumerate_pixels() {
        let v = u32::from(p.0[0]);
        out.put_pixel(
            x,
            map.height() + y,
            Luma([((v * GREYS as u32 + 127) / 255) as u8]),
        );
    }
    // The grey scale itself: 0 at the left, the largest difference at the right.
    let bar_y = height - 10;
    let bar_w = (width - 8).min(256);
    for x in 0..bar_w {
        let level = (x * GREYS as u32 / (bar_w - 1).max(1)) as u8;
        for dy in 0..8 {
            out.put_pixel(4 + x, bar_y + dy, Luma([level]));
        }
    }
    for (x, index) in [(4, MEASURED), (x2 - 14, PREDICTED)] {
        for dy in 3..13 {
            for dx in 0..10 {
                out.put_pixel(x + dx, y0 + LINE + dy - 2, Luma([index]));
            }
        }
    }
    out
}

/// Mean error by distance for one image, averaged over channels: the crop study's
/// error when there is one, else the deviation from the median.
pub fn curves(st: &ImageStudy) -> Vec<(PadMode, Vec<f64>)> {
    let Some(first) = st.channels.first() else {
        return Vec::new();
    };
    let limit = st.channels.iter().map(report_limit).max().unwrap_or(1);
    let use_crop = !first.crop.is_empty();
    (0..first.modes.len())
        .map(|i| {
            let mode = first.modes[i].0;
            let pts = (0..limit)
                .map(|d| {
                    let (mut sum, mut n) = (0.0, 0usize);
                    for ch in &st.channels {
                        let v = if use_crop {
                            &ch.crop[i].1
                        } else {
                            &ch.modes[i].2
                        };
                        if let Some(s) = v.get(d) {
                            sum += s.sum;
                            n += s.count;
                        }
                    }
                    if n == 0 {
                        f64::NAN
                    } else {
                        sum / n as f64
                    }
                })
                .collect();
            (mode, pts)
        })
        .collect()
}

fn nice_step(range: f64) -> f64 {
    let raw = range / 5.0;
    let p = 10f64.powf(raw.log10().floor());
    let m = raw / p;
    p * if m < 1.5 {
        1.0
    } else if m < 3.5 {
        2.0
    } else if m < 7.5 {
        5.0
    } else {
        10.0
    }
}

fn label_num(v: f64) -> String {
    if v == 0.0 {
        "0".into()
    } else if v.abs() >= 0.01 && v.abs() < 1e4 {
        let s = format!("{v:.4}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        format!("{v:.1e}")
    }
}

/// Plots error against distance from the edge, one line per mode, and writes a PNG.
/// plotters maps coordinates and draws the lines; labels use the bundled font
/// ([`crate::render::text`]), so no system font is needed.
pub fn write_plot(
    path: &Path,
    title: &str,
    y_label: &str,
    curves: &[(PadMode, Vec<f64>)],
) -> Result<(), Error> {
    const W: u32 = 720;
    const H: u32 = 440;
    let xmax = curves
        .iter()
        .map(|(_, v)| v.len())
        .max()
        .unwrap_or(1)
        .saturating_sub(1)
        .max(1) as f64;
    // When the largest errors dwarf the typical mode's (zero padding usually does), a
    // logarithmic axis keeps every line readable; exact zeros are then left out.
    let peak = |v: &Vec<f64>| {
        v.iter()
            .copied()
            .filter(|x| x.is_finite())
            .fold(0.0, f64::max)
    };
    let mut peaks: Vec<f64> = curves.iter().map(|(_, v)| peak(v)).collect();
    peaks.sort_by(|a, b| b.total_cmp(a));
    let min_pos = curves
        .iter()
        .flat_map(|(_, v)| v.iter().copied())
        .filter(|x| x.is_finite() && *x > 0.0)
        .fold(f64::INFINITY, f64::min);
    let median_peak = peaks.get(peaks.len() / 2).copied().unwrap_or(0.0);
    let log = peaks.len() > 1
        && median_peak > 0.0
        && peaks[0] / median_peak > 20.0
        && min_pos.is_finite();
    let (ylo, ymax) = if log {
        let lo = min_pos.log10().floor();
        (lo, peaks[0].log10().ceil().max(lo + 1.0))
    } else {
        let m = peaks.first().copied().unwrap_or(0.0);
        (0.0, if m > 0.0 { m * 1.08 } else { 1.0 })
    };
    let yval = |v: f64| match (log, v > 0.0) {
        (false, _) => Some(v),
        (true, true) => Some(v.log10()),
        (true, false) => None,
    };
    let y_label = if log {
        format!("{y_label}, log scale")
    } else {
        y_label.to_string()
    };
    let (xstep, ystep) = (
        nice_step(xmax).max(1.0),
        if log { 1.0 } else { nice_step(ymax) },
    );
    let mut buf = vec![0u8; (W * H * 3) as usize];
    let mut labels: Vec<(i32, i32, String, bool)> = Vec::new();
    let legend_x;
    {
        let perr =
            |e: &dyn std::fmt::Display| Error::io(path, std::io::Error::other(e.to_string()));
        let root = BitMapBackend::with_buffer(&mut buf, (W, H)).into_drawing_area();
        root.fill(&RGBColor(251, 250, 246)).map_err(|e| perr(&e))?;
        let mut chart = ChartBuilder::on(&root)
            .margin_left(78)
            .margin_right(150)
            .margin_top(36)
            .margin_bottom(52)
            .build_cartesian_2d(0f64..xmax, ylo..ymax)
            .map_err(|e| perr(&e))?;
        let grid = RGBColor(222, 220, 212);
        let axis = RGBColor(60, 60, 66);
        let mut x = 0.0;
        while x <= xmax + 1e-9 {
            chart
                .draw_series(LineSeries::new([(x, ylo), (x, ymax)], grid))
                .map_err(|e| perr(&e))?;
            let (px, py) = chart.backend_coord(&(x, ylo));
            labels.push((px, py + 8, label_num(x), true));
            x += xstep;
        }
        let mut y = ylo;
        while y <= ymax + 1e-12 {
            chart
                .draw_series(LineSeries::new([(0.0, y), (xmax, y)], grid))
                .map_err(|e| perr(&e))?;
            let (px, py) = chart.backend_coord(&(0.0, y));
            let text = if log {
                format!("1e{}", y.round() as i64)
            } else {
                label_num(y)
            };
            labels.push((px - 6, py - 4, text, false));
            y += ystep;
        }
        chart
            .draw_series(LineSeries::new(
                [(0.0, ylo), (xmax, ylo)],
                axis.stroke_width(2),
            ))
            .map_err(|e| perr(&e))?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, ylo), (0.0, ymax)],
                axis.stroke_width(2),
            ))
            .map_err(|e| perr(&e))?;
        for (mode, pts) in curves {
            let ([r, g, b], dashed) = mode_style(*mode);
            let style = RGBColor(r, g, b).stroke_width(2);
            let data: Vec<(f64, f64)> = pts
                .iter()
                .enumerate()
                .filter(|(_, v)| v.is_finite())
                .filter_map(|(d, v)| yval(*v).map(|y| (d as f64, y)))
                .collect();
            if dashed {
                chart
                    .draw_series(DashedLineSeries::new(data.clone(), 7, 4, style))
                    .map_err(|e| perr(&e))?;
            } else {
                chart
                    .draw_series(LineSeries::new(data.clone(), style))
                    .map_err(|e| perr(&e))?;
            }
            chart
                .draw_series(
                    data.iter()
                        .map(|p| Circle::new(*p, 3, RGBColor(r, g, b).filled())),
                )
                .map_err(|e| perr(&e))?;
        }
        let (lx, _) = chart.backend_coord(&(xmax, ymax));
        legend_x = lx + 16;
        for (i, (mode, _)) in curves.iter().enumerate() {
            let ([r, g, b], dashed) = mode_style(*mode);
            let y = 50 + i as i32 * 20;
            let seg: Vec<(i32, i32)> = vec![(legend_x, y + 4), (legend_x + 28, y + 4)];
            let st = RGBColor(r, g, b).stroke_width(3);
            if dashed {
                root.draw(&PathElement::new(
                    vec![(legend_x, y + 4), (legend_x + 10, y + 4)],
                    st,
                ))
                .map_err(|e| perr(&e))?;
                root.draw(&PathElement::new(
                    vec![(legend_x + 16, y + 4), (legend_x + 28, y + 4)],
                    st,
                ))
                .map_err(|e| perr(&e))?;
            } else {
                root.draw(&PathElement::new(seg, st))
                    .map_err(|e| perr(&e))?;
            }
            labels.push((legend_x + 36, y, mode.name().to_string(), false));
        }
        root.present().map_err(|e| perr(&e))?;
    }
    let mut img = RgbImage::from_raw(W, H, buf).expect("the buffer was made W × H × 3");
    let ink = Rgb([40, 40, 46]);
    for (x, y, text, centred) in labels {
        let width = crate::render::text::text_width(&text) as i32;
        let x0 = if centred {
            x - width / 2
        } else if x < legend_x {
            x - width
        } else {
            x
        };
        draw_text(&mut img, x0.max(0) as u32, y.max(0) as u32, &text, ink);
    }
    draw_text(&mut img, 12, 10, title, ink);
    let xl = "distance from the edge (output pixels)";
    draw_text(
        &mut img,
        (78 + (W as i32 - 228) / 2 - crate::render::text::text_width(xl) as i32 / 2).max(0) as u32,
        H - 22,
        xl,
        ink,
    );
    draw_text(&mut img, 8, 10 + crate::render::text::LINE, &y_label, ink);
    write_png(path, img.as_raw(), W, H, image::ExtendedColorType::Rgb8)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(mode: PadMode, mean_dev: f64, crop: Option<f64>) -> ModeSummary {
        ModeSummary {
            mode,
            band: 1,
            mean_dev,
            max_dev: mean_dev,
            crop_mean: crop,
            crop_max: crop,
        }
    }

    #[test]
    fn ties_for_best_are_all_marked() {
        let rows = [
            row(PadMode::Zero, 0.3, None),
            row(PadMode::Reflect, 0.1, None),
            row(PadMode::Symmetric, 0.1, None),
        ];
        assert_eq!(best(&rows), vec![1, 2]);
        let crop = [
            row(PadMode::Zero, 0.0, Some(0.5)),
            row(PadMode::Wrap, 0.2, Some(0.25)),
        ];
        assert_eq!(
            best(&crop),
            vec![1],
            "the crop error decides when there is one"
        );
        assert!(best(&[]).is_empty());
    }
}
