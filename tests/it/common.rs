//! Test helpers: an independent brute-force oracle for conv stages, and the
//! published reference tables in `shared/reference/`.
//!
//! The oracle does not use tapmap's border module: it pads explicitly, one sample
//! at a time, by folding an out-of-range index back in step by step (the way one
//! reads numpy.pad's documentation), materialises the padded image in f64 and sums
//! every tap literally.
#![allow(dead_code)]

use std::path::PathBuf;

use tapmap::border::PadMode;

/// Index of padded position `i` (may be out of range) in a signal of length `n`,
/// by literal folding; `None` means zero.
pub fn fold_index(mode: PadMode, mut i: i64, n: i64) -> Option<usize> {
    if (0..n).contains(&i) {
        return Some(i as usize);
    }
    match mode {
        PadMode::Zero => None,
        PadMode::Replicate => Some(i.clamp(0, n - 1) as usize),
        PadMode::Wrap => {
            while i < 0 {
                i += n;
            }
            while i >= n {
                i -= n;
            }
            Some(i as usize)
        }
        PadMode::Reflect => {
            if n == 1 {
                return Some(0);
            }
            // Mirror about the edge sample until inside.
            loop {
                if i < 0 {
                    i = -i;
                } else if i >= n {
                    i = 2 * (n - 1) - i;
                } else {
                    return Some(i as usize);
                }
            }
        }
        PadMode::Symmetric => loop {
            // Mirror about the edge itself (the edge sample repeats).
            if i < 0 {
                i = -i - 1;
            } else if i >= n {
                i = 2 * n - 1 - i;
            } else {
                return Some(i as usize);
            }
        },
    }
}

/// Pads a `h × w` plane explicitly.
pub fn pad_plane(
    plane: &[f64],
    h: usize,
    w: usize,
    mode: PadMode,
    pads: [usize; 4],
) -> (Vec<f64>, usize, usize) {
    let [t, b, l, r] = pads;
    let (ph, pw) = (h + t + b, w + l + r);
    let mut out = vec![0.0; ph * pw];
    for y in 0..ph {
        for x in 0..pw {
            let sy = fold_index(mode, y as i64 - t as i64, h as i64);
            let sx = fold_index(mode, x as i64 - l as i64, w as i64);
            if let (Some(sy), Some(sx)) = (sy, sx) {
                out[y * pw + x] = plane[sy * w + sx];
            }
        }
    }
    (out, ph, pw)
}

/// One kernel for the oracle: planes of `rows × cols` taps, as written (not rotated).
#[derive(Clone, Debug)]
pub struct OracleKernel {
    pub rows: usize,
    pub cols: usize,
    pub planes: Vec<Vec<f64>>,
    pub scale: f64,
    pub bias: f64,
}

/// Options for the oracle.
#[derive(Clone, Copy, Debug)]
pub struct OracleConv {
    pub mode: PadMode,
    pub pads: [usize; 4],
    pub stride: (usize, usize),
    pub dilation: (usize, usize),
    pub convolve: bool,
}

/// Literal conv of one kernel over `channels × h × w` input; returns (out, oh, ow).
pub fn oracle(
    input: &[f64],
    channels: usize,
    h: usize,
    w: usize,
    k: &OracleKernel,
    o: OracleConv,
) -> (Vec<f64>, usize, usize) {
    let padded: Vec<(Vec<f64>, usize, usize)> = (0..channels)
        .map(|c| pad_plane(&input[c * h * w..(c + 1) * h * w], h, w, o.mode, o.pads))
        .collect();
    let (ph, pw) = (padded[0].1, padded[0].2);
    let ext_h = o.dilation.0 * (k.rows - 1) + 1;
    let ext_w = o.dilation.1 * (k.cols - 1) + 1;
    assert!(
        ext_h <= ph && ext_w <= pw,
        "oracle called with impossible geometry"
    );
    // Count the outputs by sliding, not by the formula under test.
    let mut oh = 0;
    while oh * o.stride.0 + ext_h <= ph {
        oh += 1;
    }
    let mut ow = 0;
    while ow * o.stride.1 + ext_w <= pw {
        ow += 1;
    }
    let mut out = vec![0.0; oh * ow];
    for y in 0..oh {
        for x in 0..ow {
            let mut acc = 0.0;
            for (c, (p, _, _)) in padded.iter().enumerate() {
                for u in 0..k.rows {
                    for v in 0..k.cols {
                        // Convolution reads the taps rotated by 180°.
                        let (tu, tv) = if o.convolve {
                            (k.rows - 1 - u, k.cols - 1 - v)
                        } else {
                            (u, v)
                        };
                        let t = k.planes[c][tu * k.cols + tv];
                        acc += t * p[(y * o.stride.0 + u * o.dilation.0) * pw
                            + x * o.stride.1
                            + v * o.dilation.1];
                    }
                }
            }
            out[y * ow + x] = acc * k.scale + k.bias;
        }
    }
    (out, oh, ow)
}

/// Path of a file in the project's `shared/reference/` folder.
pub fn reference_path(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("shared")
        .join("reference")
        .join(name)
}

/// Loads a reference table.
pub fn reference(name: &str) -> serde_json::Value {
    let text = std::fs::read_to_string(reference_path(name)).expect("reference file");
    serde_json::from_str(&text).expect("reference JSON")
}

/// A JSON array of numbers as f64.
pub fn nums(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

/// A JSON array of arrays of numbers.
pub fn rows(v: &serde_json::Value) -> Vec<Vec<f64>> {
    v.as_array().expect("array").iter().map(nums).collect()
}

/// Worst absolute difference and where, for reporting.
pub fn worst(a: &[f32], b: &[f64]) -> (f64, usize) {
    a.iter()
        .zip(b)
        .enumerate()
        .map(|(i, (x, y))| ((*x as f64 - y).abs(), i))
        .fold(
            (0.0, 0),
            |m, v| if v.0 > m.0 || v.0.is_nan() { v } else { m },
        )
}

/// A run record (manifest or journal) without what differs between two runs
/// that wrote the same bytes: each output's modification time, the journal
/// lines' checks made over it, and the manifest's clock fields. Journals are
/// compared line by line.
pub fn without_times(name: &std::path::Path, bytes: &[u8]) -> Vec<u8> {
    fn strip(v: &mut serde_json::Value) {
        match v {
            serde_json::Value::Object(o) => {
                o.shift_remove("modified");
                o.shift_remove("check");
                o.values_mut().for_each(strip);
            }
            serde_json::Value::Array(a) => a.iter_mut().for_each(strip),
            _ => {}
        }
    }
    let file = name.file_name().and_then(|f| f.to_str()).unwrap_or("");
    match file {
        "journal.jsonl" => {
            let mut out = Vec::new();
            for line in String::from_utf8_lossy(bytes).lines() {
                let mut v: serde_json::Value = serde_json::from_str(line).unwrap();
                strip(&mut v);
                out.extend(serde_json::to_vec(&v).unwrap());
                out.push(b'\n');
            }
            out
        }
        "manifest.json" => {
            let mut m: serde_json::Value = serde_json::from_slice(bytes).unwrap();
            strip(&mut m);
            if let Some(o) = m.as_object_mut() {
                for k in ["started", "finished", "seconds", "command_line", "resumed"] {
                    o.shift_remove(k);
                }
            }
            serde_json::to_vec(&m).unwrap()
        }
        _ => bytes.to_vec(),
    }
}

/// The tapmap binary as a command, with the job schedulers' variables removed
/// (a test run inside a Slurm or Kubernetes job must not pick up its part).
pub fn tapmap_command() -> std::process::Command {
    let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_tapmap"));
    for k in [
        "SLURM_ARRAY_TASK_ID",
        "SLURM_ARRAY_TASK_MIN",
        "SLURM_ARRAY_TASK_COUNT",
        "JOB_COMPLETION_INDEX",
    ] {
        c.env_remove(k);
    }
    c
}

/// Standard output of a successful tapmap command, parsed as JSON.
pub fn json_of(args: &[&str]) -> serde_json::Value {
    let out = tapmap_command().args(args).output().unwrap();
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{args:?}: not JSON: {e}"))
}
