//! Any bytes through tapmap's own image input: content sniffing, the whole-JPEG
//! check, size and memory limits, EXIF orientation, colour modes, float TIFF and
//! .npy arrays. Errors are fine; panics and runaway allocation are not.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tapmap::image_io::{decode_image, ColorMode, ReadOptions};
use tapmap::limits::Limits;

fuzz_target!(|data: &[u8]| {
    // Small limits keep one input from taking the fuzzer's memory.
    let base = ReadOptions {
        limits: Limits {
            max_pixels: 1 << 22,
            max_memory: 256 << 20,
        },
        ..ReadOptions::default()
    };
    let first = data.first().copied().unwrap_or(0);
    let opts = ReadOptions {
        color: match first % 3 {
            0 => ColorMode::Luma,
            1 => ColorMode::Rgb,
            _ => ColorMode::Split,
        },
        apply_orientation: first & 4 == 0,
        white: (first & 8 != 0).then_some(4095),
        ..base
    };
    if let Ok(img) = decode_image(data, std::path::Path::new("fuzz.bin"), &opts) {
        assert!(img.data.iter().all(|v| v.is_finite()));
        let (c, h, w) = img.data.dim();
        assert!(c >= 1 && h >= 1 && w >= 1);
        assert!((h * w) as u64 <= opts.limits.max_pixels);
    }
});
