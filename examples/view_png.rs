//! Size against time of PNG settings for views: how `--view-png` levels were
//! chosen. Reads a `.npy` map file (C × H × W float32, as `apply` writes),
//! turns each map into 8-bit levels as a view does (grey from 0 to its
//! maximum for a non-negative map; diverging palette indices for a signed
//! one), and encodes it with each candidate setting, printing milliseconds and
//! bytes per map.
//!
//! `cargo run --release --example view_png -- runs/x/maps/tile.npy`

use std::time::Instant;

use ndarray::Array3;
use ndarray_npy::ReadNpyExt;
use png::{BitDepth, ColorType, DeflateCompression, Filter};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let path = std::env::args().nth(1).ok_or("give a .npy map file")?;
    let maps = Array3::<f32>::read_npy(std::fs::File::open(&path)?)?;
    let (c, h, w) = maps.dim();
    let settings: [(&str, DeflateCompression, Filter); 7] = [
        (
            "stored",
            DeflateCompression::NoCompression,
            Filter::NoFilter,
        ),
        (
            "ultrafast/none",
            DeflateCompression::FdeflateUltraFast,
            Filter::NoFilter,
        ),
        (
            "ultrafast/up",
            DeflateCompression::FdeflateUltraFast,
            Filter::Up,
        ),
        (
            "ultrafast/adaptive",
            DeflateCompression::FdeflateUltraFast,
            Filter::Adaptive,
        ),
        ("zlib1/up", DeflateCompression::Level(1), Filter::Up),
        (
            "zlib6/adaptive",
            DeflateCompression::Level(6),
            Filter::Adaptive,
        ),
        (
            "zlib9/adaptive",
            DeflateCompression::Level(9),
            Filter::Adaptive,
        ),
    ];
    println!("{path}: {c} maps of {w}×{h}");
    for k in 0..c {
        let m = maps.index_axis(ndarray::Axis(0), k);
        let v: Vec<f32> = m.iter().copied().collect();
        let signed = v.iter().any(|x| *x < 0.0);
        let top = v.iter().fold(0.0f32, |a, x| a.max(x.abs())) as f64;
        let levels: Vec<u8> = v
            .iter()
            .map(|&x| {
                let t = if top > 0.0 { x as f64 / top } else { 0.0 };
                if signed {
                    (127.5 + 127.5 * t.clamp(-1.0, 1.0)).round() as u8
                } else {
                    (t * 255.0).round().clamp(0.0, 255.0) as u8
                }
            })
            .collect();
        for (name, deflate, filter) in settings {
            let t = Instant::now();
            let mut out = Vec::new();
            {
                let mut e = png::Encoder::new(&mut out, w as u32, h as u32);
                if signed {
                    e.set_color(ColorType::Indexed);
                    e.set_palette((0..256).flat_map(|i| [i as u8; 3]).collect::<Vec<u8>>());
                } else {
                    e.set_color(ColorType::Grayscale);
                }
                e.set_depth(BitDepth::Eight);
                e.set_deflate_compression(deflate);
                e.set_filter(filter);
                e.write_header()?.write_image_data(&levels)?;
            }
            println!(
                "  map {k} ({}) {name:<20} {:>8.1} ms {:>10} bytes ({:.2} bytes/pixel)",
                if signed { "signed" } else { "grey" },
                t.elapsed().as_secs_f64() * 1e3,
                out.len(),
                out.len() as f64 / (w * h) as f64
            );
        }
    }
    Ok(())
}
