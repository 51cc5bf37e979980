//! Any bytes through tapmap's own image input: content sniffing, the whole-JPEG
//! check, size and memory limits, EXIF orientation, colour modes, float TIFF and
//! .npy arrays. Errors are fine; panics and runaway allocation are not. The
//! bytes go through a file because the reader works on paths, as a run does.
#![no_main]

use std::io::Write;

use libfuzzer_sys::fuzz_target;
use tapmap::io::read::{read_image, ColorMode, ReadOptions};

fuzz_target!(|data: &[u8]| {
    let mut f = tempfile::NamedTempFile::new_in(std::env::temp_dir()).expect("temp file");
    f.write_all(data).expect("write");
    f.flush().expect("flush");
    // Small limits keep one input from taking the fuzzer's memory.
    let base = ReadOptions {
        max_pixels: 1 << 22,
        max_memory: 256 << 20,
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
    if let Ok(img) = read_image(f.path(), &opts) {
        assert!(img.data.iter().all(|v| v.is_finite()));
        let (c, h, w) = img.data.dim();
        assert!(c >= 1 && h >= 1 && w >= 1);
        assert!((h * w) as u64 <= opts.max_pixels);
    }
});
