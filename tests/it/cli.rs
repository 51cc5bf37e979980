//! End-to-end runs of the `tapmap` binary, each in a fresh temporary folder.

use std::path::{Path, PathBuf};

use assert_cmd::cargo::cargo_bin_cmd;
use image::{ImageBuffer, Luma, Rgb};
use ndarray::Array3;
use ndarray_npy::ReadNpyExt;
use predicates::prelude::*;
use tempfile::TempDir;

fn tapmap() -> assert_cmd::Command {
    cargo_bin_cmd!("tapmap")
}

fn read_npy(path: &Path) -> Array3<f32> {
    Array3::<f32>::read_npy(std::fs::File::open(path).unwrap()).unwrap()
}

/// An 8-bit grey image whose pixel (x, y) is (x·7 + y·3) mod 256.
fn grey8(dir: &Path, name: &str, w: u32, h: u32) -> PathBuf {
    let p = dir.join(name);
    ImageBuffer::from_fn(w, h, |x, y| Luma([((x * 7 + y * 3) % 256) as u8]))
        .save(&p)
        .unwrap();
    p
}

fn grey16(dir: &Path, name: &str, w: u32, h: u32) -> PathBuf {
    let p = dir.join(name);
    ImageBuffer::from_fn(w, h, |x, y| Luma([(x * 1000 + y * 7) as u16]))
        .save(&p)
        .unwrap();
    p
}

fn leftovers(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with(".tapmap") || n.ends_with(".part"))
        .collect()
}

#[test]
fn apply_writes_npy_maps_with_the_documented_shape_and_values() {
    let t = TempDir::new().unwrap();
    let a = grey8(t.path(), "a.png", 9, 6);
    let b = grey16(t.path(), "b.tif", 5, 4);
    let out = t.path().join("maps");
    tapmap()
        .args(["apply", "--bank", "identity+sobel-x", "--out"])
        .arg(&out)
        .args([&a, &b])
        .assert()
        .success();
    let ma = read_npy(&out.join("maps/a.npy"));
    assert_eq!(ma.dim(), (2, 6, 9), "C×H×W");
    // Integers scale by full scale: 8-bit by 255 (PRODUCT §5).
    assert_eq!(ma[[0, 2, 4]], (4 * 7 + 2 * 3) as f32 / 255.0);
    // Interior sobel-x on a ramp of 7/255 per column: 8·7/255.
    assert!((ma[[1, 2, 4]] - 56.0 / 255.0).abs() < 1e-6);
    let mb = read_npy(&out.join("maps/b.npy"));
    assert_eq!(mb.dim(), (2, 4, 5));
    assert_eq!(
        mb[[0, 3, 2]],
        (2000 + 21) as f32 / 65535.0,
        "16-bit by 65535"
    );
    // The .npy header is what numpy.load expects (NumPy format 1.0, '<f4', C order).
    let bytes = std::fs::read(out.join("maps/b.npy")).unwrap();
    assert_eq!(&bytes[..6], b"\x93NUMPY");
    let header = String::from_utf8_lossy(&bytes[10..80]);
    assert!(
        header.contains("'descr': '<f4'")
            && header.contains("'fortran_order': False")
            && header.contains("(2, 4, 5)"),
        "{header}"
    );
    assert!(leftovers(&out.join("maps")).is_empty());
}

#[test]
fn colour_becomes_bt709_luma_and_jpeg_reads() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("c.png");
    ImageBuffer::from_fn(4, 3, |x, _| {
        if x < 2 {
            Rgb([255u8, 0, 0])
        } else {
            Rgb([0u8, 0, 255])
        }
    })
    .save(&p)
    .unwrap();
    let j = t.path().join("j.jpg");
    ImageBuffer::from_fn(16, 16, |_, _| Rgb([128u8, 128, 128]))
        .save(&j)
        .unwrap();
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "identity", "-o"])
        .arg(&out)
        .args([&p, &j])
        .assert()
        .success();
    let m = read_npy(&out.join("maps/c.npy"));
    // ITU-R BT.709-6 item 3.2: Y = 0.2126 R + 0.7152 G + 0.0722 B.
    assert!((m[[0, 0, 0]] - 0.2126).abs() < 1e-6 && (m[[0, 2, 3]] - 0.0722).abs() < 1e-6);
    let mj = read_npy(&out.join("maps/j.npy"));
    assert_eq!(mj.dim(), (1, 16, 16));
    assert!(
        (mj[[0, 8, 8]] - 128.0 / 255.0).abs() < 3.0 / 255.0,
        "JPEG is lossy, within 3 levels"
    );
}

#[test]
fn stride_act_and_pool_shape_the_output() {
    let t = TempDir::new().unwrap();
    let a = grey8(t.path(), "a.png", 11, 7);
    let out = t.path().join("o");
    tapmap()
        .args([
            "apply",
            "--bank",
            "edges",
            "--stride",
            "2",
            "--pad",
            "reflect",
            "--act",
            "abs",
            "--pool",
            "max",
            "--pool-size",
            "2",
            "-o",
        ])
        .arg(&out)
        .arg(&a)
        .assert()
        .success();
    // same + stride 2: ceil(7/2)×ceil(11/2) = 4×6; pool 2: 2×3.
    assert_eq!(read_npy(&out.join("maps/a.npy")).dim(), (3, 2, 3));
    tapmap()
        .args([
            "apply",
            "--bank",
            "edges",
            "--pool",
            "mean",
            "--pool-size",
            "global",
            "-o",
        ])
        .arg(&out)
        .arg(&a)
        .assert()
        .success();
    let g = read_npy(&out.join("maps/a.npy"));
    assert_eq!(g.dim(), (3, 1, 1));
}

#[test]
fn bad_images_are_reported_and_the_others_still_written() {
    let t = TempDir::new().unwrap();
    let good = grey8(t.path(), "good.png", 8, 8);
    let text = t.path().join("notes.png");
    std::fs::write(&text, "line A shift log, not an image\n").unwrap();
    let trunc = t.path().join("trunc.png");
    let bytes = std::fs::read(&good).unwrap();
    std::fs::write(&trunc, &bytes[..bytes.len() / 2]).unwrap();
    let empty = t.path().join("empty.tif");
    std::fs::write(&empty, b"").unwrap();
    let tiny = grey8(t.path(), "tiny.png", 2, 2);
    let out = t.path().join("o");
    let assert = tapmap()
        .args(["apply", "--bank", "box:size=5", "--extent", "valid", "-o"])
        .arg(&out)
        .args([&text, &good, &trunc, &empty, &tiny])
        .assert()
        .code(1);
    let err = String::from_utf8_lossy(&assert.get_output().stderr).into_owned();
    for needle in [
        "notes.png: is not an image",
        "trunc.png: is truncated",
        "empty.tif: is empty",
        "tiny.png: stage 1 (conv): kernel 'box:size=5' (5×5): kernel height 5 is larger than the padded input height 2",
        "1 processed",
        "4 failed",
    ] {
        assert!(err.contains(needle), "stderr lacks '{needle}':\n{err}");
    }
    assert_eq!(read_npy(&out.join("maps/good.npy")).dim(), (1, 4, 4));
    for name in ["notes.npy", "trunc.npy", "empty.npy", "tiny.npy"] {
        assert!(
            !out.join("maps").join(name).exists(),
            "{name} must not be written"
        );
    }
    assert!(leftovers(&out.join("maps")).is_empty());
    // The good file's map is byte-identical to a run without the bad ones.
    let out2 = t.path().join("o2");
    tapmap()
        .args(["apply", "--bank", "box:size=5", "--extent", "valid", "-o"])
        .arg(&out2)
        .arg(&good)
        .assert()
        .success();
    assert_eq!(
        std::fs::read(out.join("maps/good.npy")).unwrap(),
        std::fs::read(out2.join("maps/good.npy")).unwrap()
    );
}

#[test]
fn usage_and_setup_errors_exit_2_before_any_work() {
    let t = TempDir::new().unwrap();
    let a = grey8(t.path(), "a.png", 8, 8);
    let out = t.path().join("o");
    let cases: Vec<(Vec<String>, &str)> = vec![
        (
            vec!["--bank".into(), "sobelx".into()],
            "near names: sobel-x",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--stride".into(),
                "0".into(),
            ],
            "stride is 0",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--dilation".into(),
                "1,0".into(),
            ],
            "dilation is 0",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--pad".into(),
                "mirror".into(),
            ],
            "unknown pad mode 'mirror'",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--extent".into(),
                "valid".into(),
                "--pad-width".into(),
                "2".into(),
            ],
            "cannot be used with",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--pad-width".into(),
                "1,2".into(),
            ],
            "give one, or four",
        ),
        (
            vec![
                "--bank".into(),
                "edges".into(),
                "--act".into(),
                "gelu".into(),
            ],
            "unknown activation",
        ),
    ];
    for (args, needle) in cases {
        tapmap()
            .arg("apply")
            .args(&args)
            .arg("-o")
            .arg(&out)
            .arg(&a)
            .assert()
            .code(2)
            .stderr(predicate::str::contains(needle));
    }
    assert!(!out.exists(), "no output folder is made for a usage error");
    // A bank file with ragged rows: file, line and the problem.
    let bad = t.path().join("bad-bank.toml");
    std::fs::write(
        &bad,
        "name = \"x\"\n[[kernel]]\nname = \"k\"\ntaps = [[1, 2], [3]]\n",
    )
    .unwrap();
    tapmap()
        .args(["apply", "--bank"])
        .arg(&bad)
        .arg("-o")
        .arg(&out)
        .arg(&a)
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "bad-bank.toml: line 4, column 8: kernel 'k' has ragged taps",
        ));
    // Output folder that cannot be made (a file stands in its way).
    let blocker = t.path().join("blocker");
    std::fs::write(&blocker, "x").unwrap();
    tapmap()
        .args(["apply", "--bank", "edges", "-o"])
        .arg(blocker.join("sub"))
        .arg(&a)
        .assert()
        .code(2)
        .stderr(predicate::str::contains("blocker"));
    // Two inputs with one output name.
    let d = t.path().join("other");
    std::fs::create_dir(&d).unwrap();
    let a2 = grey8(&d, "a.png", 4, 4);
    tapmap()
        .args(["apply", "--bank", "edges", "-o"])
        .arg(&out)
        .args([&a, &a2])
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "would be written by more than one input",
        ));
    assert!(!out.exists());
}

#[test]
fn plan_prints_sizes_padding_field_cost_and_unused_edge() {
    let out = tapmap()
        .args([
            "reckon",
            "--size",
            "10x10",
            "--bank",
            "box:size=3",
            "--extent",
            "valid",
            "--stride",
            "4",
        ])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let s = String::from_utf8(out).unwrap();
    // o = floor((10 − 3)/4) + 1 = 2; rows 7..9 unused; 2·2·9 = 36 multiply-adds.
    assert!(s.contains("1×2×2"), "{s}");
    assert!(s.contains("3,3"), "{s}");
    assert!(s.contains("36"), "{s}");
    assert!(s.contains("3×3 / 4×4"), "{s}");
    tapmap()
        .args([
            "reckon",
            "--size",
            "2x2",
            "--bank",
            "box:size=5",
            "--extent",
            "valid",
        ])
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "kernel height 5 is larger than the padded input height 2",
        ));
    tapmap()
        .args(["reckon", "--size", "10by10", "--bank", "edges"])
        .assert()
        .code(2);
}

#[test]
fn bank_make_show_and_list() {
    let t = TempDir::new().unwrap();
    let file = t.path().join("cracks.toml");
    tapmap()
        .args([
            "bank",
            "make",
            "gabor:theta=0",
            "gabor",
            "theta=90",
            "gaussian",
            "sigma=2",
            "--op",
            "convolve",
            "-o",
        ])
        .arg(&file)
        .assert()
        .success();
    let text = std::fs::read_to_string(&file).unwrap();
    assert!(
        text.contains("name = \"cracks\"")
            && text.contains("op = \"convolve\"")
            && text.contains("theta = 90.0"),
        "{text}"
    );
    tapmap()
        .args(["bank", "show"])
        .arg(&file)
        .assert()
        .success()
        .stdout(
            predicate::str::contains("bank cracks: 3 kernel(s), op convolve")
                .and(predicate::str::contains("rank 1")),
        );
    tapmap()
        .args(["bank", "show", "sobel-x"])
        .assert()
        .success()
        .stdout(predicate::str::contains(
            "separable: column [1 2 1] ⊗ row [-1 0 1]",
        ));
    let list = tapmap()
        .args(["bank", "list"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let list = String::from_utf8(list).unwrap();
    for f in tapmap::kernel::families::FAMILIES {
        assert!(
            list.contains(f.name) && list.contains(f.source),
            "{}",
            f.name
        );
    }
    tapmap()
        .args(["bank", "make", "sigma=2", "-o"])
        .arg(&file)
        .assert()
        .code(2)
        .stderr(predicate::str::contains("before any family"));
    tapmap()
        .args(["bank", "show", "laplace-5"])
        .assert()
        .code(2)
        .stderr(predicate::str::contains("laplace-4"));
}

#[test]
fn bank_op_override_flips_the_taps() {
    let t = TempDir::new().unwrap();
    let a = grey8(t.path(), "a.png", 9, 5);
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "sobel-x", "-o"])
        .arg(&out)
        .arg(&a)
        .assert()
        .success();
    let corr = read_npy(&out.join("maps/a.npy"));
    tapmap()
        .args(["apply", "--bank", "sobel-x", "--op", "convolve", "-o"])
        .arg(&out)
        .arg(&a)
        .assert()
        .success();
    let conv = read_npy(&out.join("maps/a.npy"));
    // sobel-x is odd under 180° rotation, so convolve = −correlate.
    for (x, y) in corr.iter().zip(conv.iter()) {
        assert_eq!(*x, -*y);
    }
    assert!(
        corr[[0, 2, 4]] > 0.0,
        "brightness rising to the right gives a positive response"
    );
}

#[test]
fn every_engine_can_be_forced_from_the_command_line() {
    // --engine takes every strategy by name; all give the same maps (to f32
    // rounding), and reckon shows the planner's choice with its reason.
    let t = TempDir::new().unwrap();
    let img = grey16(t.path(), "tile.png", 40, 33);
    let mut maps = Vec::new();
    for engine in ["auto", "reference", "direct", "separable", "matmul", "fft"] {
        let out = t.path().join(engine);
        tapmap()
            .args([
                "apply",
                "--bank",
                "log:sigma=2",
                "--pad",
                "reflect",
                "-q",
                "--engine",
                engine,
                "-o",
            ])
            .arg(&out)
            .arg(&img)
            .assert()
            .success();
        maps.push((engine, read_npy(&out.join("maps/tile.npy"))));
    }
    let (_, reference) = &maps[1];
    let scale = reference.iter().fold(0.0f32, |m, v| m.max(v.abs()));
    for (engine, m) in &maps {
        let worst = m
            .iter()
            .zip(reference.iter())
            .fold(0.0f32, |w, (a, b)| w.max((a - b).abs()));
        assert!(worst <= 1e-5 * scale.max(1.0), "{engine}: off by {worst}");
    }
    let plan = tapmap()
        .args(["reckon", "--size", "512x512", "--bank", "log:sigma=2"])
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let plan = String::from_utf8(plan).unwrap();
    assert!(
        plan.contains("fft") && plan.contains("taps per output"),
        "{plan}"
    );
    tapmap()
        .args([
            "reckon", "--size", "64x64", "--bank", "edges", "--engine", "gpu",
        ])
        .assert()
        .code(2)
        .stderr(predicates::str::contains(
            "expected auto, reference, direct, separable, matmul or fft",
        ));
}

#[test]
fn the_default_pad_mode_follows_what_the_bank_is_and_says_why() {
    let t = TempDir::new().unwrap();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let pads = |args: &[&str]| -> (String, String) {
        let mut all = vec!["reckon", "--size", "32x24", "--json"];
        all.extend_from_slice(args);
        let v = crate::common::json_of(&all);
        (
            v["pads"][0]["mode"].as_str().unwrap().to_string(),
            v["pads"][0]["why"].as_str().unwrap().to_string(),
        )
    };
    // Built-in banks: the border study's best on the line captures.
    let (mode, why) = pads(&["--bank", "edges"]);
    assert_eq!(mode, "symmetric");
    assert!(why.starts_with("default for built-in"), "{why}");
    // Trained weights keep zero, given directly or through `bank import`.
    let weights = root.join("sample_data/learned/first-layer.safetensors");
    let w = format!("{}:conv1.weight", weights.display());
    assert_eq!(pads(&["--bank", &w]).0, "zero");
    let imported = t.path().join("learned.toml");
    tapmap()
        .args(["bank", "import"])
        .arg(&weights)
        .args(["--tensor", "conv1.weight", "-o"])
        .arg(&imported)
        .assert()
        .success();
    assert!(std::fs::read_to_string(&imported)
        .unwrap()
        .contains("pad = \"zero\""));
    let (mode, why) = pads(&["--bank", imported.to_str().unwrap()]);
    assert_eq!(
        (mode.as_str(), why.contains("trained weights")),
        ("zero", true)
    );
    // A bank file that names its mode, a recipe that does, and the flag.
    let wrap = t.path().join("wrap.toml");
    std::fs::write(
        &wrap,
        "name = \"w\"\npad = \"wrap\"\n[[kernel]]\nname = \"k\"\nfamily = \"box\"\n",
    )
    .unwrap();
    assert_eq!(
        pads(&["--bank", wrap.to_str().unwrap()]),
        ("wrap".into(), "the bank file names it".into())
    );
    let recipe = root.join("kernels/line-a-edges.recipe.toml");
    assert_eq!(pads(&["--recipe", recipe.to_str().unwrap()]).0, "reflect");
    assert_eq!(
        pads(&["--bank", "edges", "--pad", "zero"]),
        ("zero".into(), "--pad".into())
    );
    // The manifest keeps the mode and the reason.
    let img = grey8(t.path(), "a.png", 9, 7);
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "edges", "-q", "-o"])
        .arg(&out)
        .arg(&img)
        .assert()
        .success();
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("manifest.json")).unwrap()).unwrap();
    assert_eq!(m["recipe"]["stages"][0]["pad"], "symmetric");
    assert!(m["recipe"]["stages"][0]["pad_reason"]
        .as_str()
        .unwrap()
        .starts_with("default"));
}

#[test]
fn every_error_and_warning_speaks_in_one_style() {
    let t = TempDir::new().unwrap();
    let good = grey8(t.path(), "good.png", 12, 10);
    let bad = t.path().join("bad.png");
    std::fs::write(&bad, b"not an image").unwrap();
    let out = t.path().join("o");
    let cases: Vec<(Vec<std::ffi::OsString>, i32)> = vec![
        // A flag's value clap refuses.
        (
            ["reckon", "--size", "10by10", "--bank", "edges"]
                .map(Into::into)
                .to_vec(),
            2,
        ),
        // A set-up error before any work.
        (
            ["apply", "--bank", "no-such-bank", "-o"]
                .map(Into::into)
                .into_iter()
                .chain([out.clone().into(), good.clone().into()])
                .collect(),
            2,
        ),
        // One bad input among good ones, and a warning.
        (
            ["apply", "--bank", "edges", "--view-depth", "16", "-o"]
                .map(Into::into)
                .into_iter()
                .chain([out.clone().into(), good.clone().into(), bad.clone().into()])
                .collect(),
            1,
        ),
    ];
    for (args, code) in cases {
        let o = tapmap().args(&args).assert().code(code);
        let err = String::from_utf8_lossy(&o.get_output().stderr).into_owned();
        let first = err.lines().next().unwrap_or_default();
        assert!(
            first.starts_with("tapmap: error: ") || first.starts_with("tapmap: warning: "),
            "{args:?}:\n{err}"
        );
        for line in err
            .lines()
            .filter(|l| l.contains("error") || l.contains("warning"))
        {
            if line.starts_with("tapmap:") {
                assert!(
                    line.starts_with("tapmap: error: ") || line.starts_with("tapmap: warning: "),
                    "{line}"
                );
            }
        }
    }
    // The failed input names its file and the problem.
    let o = tapmap()
        .args(["apply", "--bank", "edges", "-o"])
        .arg(&out)
        .arg(&bad)
        .assert()
        .code(1);
    let err = String::from_utf8_lossy(&o.get_output().stderr).into_owned();
    assert!(
        err.contains("tapmap: error: ") && err.contains("bad.png: "),
        "{err}"
    );
}
