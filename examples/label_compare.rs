//! tapmap's component labelling against imageproc's `connected_components`
//! on the same thresholded map: time and the count found, to back the choice
//! made in `src/regions.rs`.
//!
//! `cargo run --release --example label_compare [SIDE]` (default 4096): a
//! smooth field with noise, thresholded at three levels, 8-connected.

use std::time::Instant;

use image::{GrayImage, Luma};
use imageproc::region_labelling::{connected_components, Connectivity};

fn main() {
    let side: usize = std::env::args()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(4096);
    let mut s = 0x2545_f491_4f6c_dd1du64;
    let values: Vec<f32> = (0..side * side)
        .map(|i| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            let (y, x) = ((i / side) as f32, (i % side) as f32);
            let smooth = (x * 0.01).sin() * (y * 0.013).cos();
            smooth * 0.5 + 0.5 * ((s >> 40) as f32 / (1u64 << 24) as f32)
        })
        .collect();
    for t in [0.5f32, 0.7, 0.85] {
        let start = Instant::now();
        let ours = tapmap::regions::regions(
            &values,
            side,
            side,
            t,
            tapmap::regions::Connectivity::Eight,
            0,
        );
        let ours_s = start.elapsed().as_secs_f64();
        let start = Instant::now();
        let mask = GrayImage::from_fn(side as u32, side as u32, |x, y| {
            Luma([u8::from(values[y as usize * side + x as usize] > t) * 255])
        });
        let labels = connected_components(&mask, Connectivity::Eight, Luma([0u8]));
        let theirs = labels.pixels().map(|p| p[0]).max().unwrap_or(0);
        let theirs_s = start.elapsed().as_secs_f64();
        println!(
            "threshold {t}: tapmap {} components in {:.3} s; imageproc {} in {:.3} s (mask included); ratio {:.1}x",
            ours.components,
            ours_s,
            theirs,
            theirs_s,
            theirs_s / ours_s
        );
    }
}
