//! End-to-end batch runs: inputs, mirroring, orientation, bit depth, colour modes,
//! recipes, statistics, views and the manifest. Each test in a fresh temp folder.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

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

fn npy(path: &Path) -> Array3<f32> {
    Array3::<f32>::read_npy(
        std::fs::File::open(path).unwrap_or_else(|e| panic!("{}: {e}", path.display())),
    )
    .unwrap()
}

fn grey8(path: &Path, w: u32, h: u32, seed: u32) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    ImageBuffer::from_fn(w, h, |x, y| {
        Luma([((x * 7 + y * 13 + seed * 29) % 251) as u8])
    })
    .save(path)
    .unwrap();
}

/// Rows of a CSV file as maps from column name to value.
fn csv_rows(path: &Path) -> Vec<std::collections::HashMap<String, String>> {
    let mut r = csv::Reader::from_path(path).unwrap();
    let h = r.headers().unwrap().clone();
    r.records()
        .map(|rec| {
            h.iter()
                .zip(rec.unwrap().iter())
                .map(|(a, b)| (a.to_string(), b.to_string()))
                .collect()
        })
        .collect()
}

#[test]
fn folders_mirror_and_the_output_folder_is_never_read() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("captures");
    grey8(&inp.join("s1/a.png"), 12, 9, 1);
    grey8(&inp.join("s2/deep/b.png"), 10, 8, 2);
    grey8(&inp.join("top.png"), 8, 8, 3);
    std::fs::write(inp.join("s1/notes.txt"), "not an image").unwrap();
    let out = inp.join("runs/first"); // inside the input folder
    for _ in 0..2 {
        tapmap()
            .args(["apply", "--bank", "edges", "--save", "all", "-q", "-o"])
            .arg(&out)
            .arg(&inp)
            .assert()
            .success();
        let rows = csv_rows(&out.join("images.csv"));
        let paths: Vec<&str> = rows.iter().map(|r| r["path"].as_str()).collect();
        assert_eq!(
            paths,
            ["s1/a.png", "s2/deep/b.png", "top.png"],
            "sorted, mirrored, output folder skipped"
        );
    }
    assert_eq!(npy(&out.join("maps/s2/deep/b.npy")).dim(), (3, 8, 10));
    assert!(out.join("views/s1/a/00-sobel-x.png").is_file());
    assert!(out.join("sheets/top.png").is_file());
    assert!(out.join("tiff/s1/a/02-laplace-8.tif").is_file());
    // A file given alone lands at the top.
    let out2 = t.path().join("o2");
    tapmap()
        .args(["apply", "--bank", "edges", "-q", "-o"])
        .arg(&out2)
        .arg(inp.join("s2/deep/b.png"))
        .assert()
        .success();
    assert!(out2.join("maps/b.npy").is_file());
}

#[test]
fn glob_patterns_are_expanded_by_the_tool() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("line");
    grey8(&inp.join("s1/a.png"), 8, 8, 1);
    grey8(&inp.join("s1/b.png"), 8, 8, 2);
    grey8(&inp.join("s2/c.png"), 8, 8, 3);
    grey8(&inp.join("s2/d.bmp"), 8, 8, 4);
    let out = t.path().join("o");
    let pattern = format!("{}/**/*.png", inp.display());
    tapmap()
        .args(["apply", "--bank", "identity", "-q", "-o"])
        .arg(&out)
        .arg(&pattern)
        .assert()
        .success();
    let paths: Vec<String> = csv_rows(&out.join("images.csv"))
        .iter()
        .map(|r| r["path"].clone())
        .collect();
    assert_eq!(paths, ["s1/a.png", "s1/b.png", "s2/c.png"]);
    let out = t.path().join("o2");
    tapmap()
        .args(["apply", "--bank", "identity", "-q", "-o"])
        .arg(&out)
        .arg(format!("{}/s2/*", inp.display()))
        .assert()
        .success();
    let paths: Vec<String> = csv_rows(&out.join("images.csv"))
        .iter()
        .map(|r| r["path"].clone())
        .collect();
    assert_eq!(paths, ["c.png", "d.bmp"]);
    tapmap()
        .args(["apply", "--bank", "identity", "-o"])
        .arg(&out)
        .arg(format!("{}/*.gif", inp.display()))
        .assert()
        .code(2)
        .stderr(predicate::str::contains("matches no image files"));
}

#[test]
fn two_inputs_with_one_output_name_are_refused_before_work() {
    let t = TempDir::new().unwrap();
    grey8(&t.path().join("in/x.png"), 8, 8, 1);
    grey8(&t.path().join("in/x.bmp"), 8, 8, 2);
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "edges", "-o"])
        .arg(&out)
        .arg(t.path().join("in"))
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "would be written by more than one input: x",
        ));
    assert!(!out.exists());
}

/// An asymmetric upright pattern D (h × w).
fn pattern(h: usize, w: usize) -> Vec<Vec<u16>> {
    (0..h)
        .map(|y| {
            (0..w)
                .map(|x| ((x * x * 37 + y * 1009 + (x * y) % 7 * 4000) % 60000) as u16)
                .collect()
        })
        .collect()
}

/// Stored pixels S for EXIF/TIFF orientation `o` such that a viewer shows D.
/// From the TIFF 6.0 specification, Orientation tag (p. 37): e.g. 6 = "the 0th
/// row represents the visual right-hand side of the image, and the 0th column
/// represents the visual top".
fn stored_for(o: u16, d: &[Vec<u16>]) -> Vec<Vec<u16>> {
    let (h, w) = (d.len(), d[0].len());
    let (sr, sc) = if o <= 4 { (h, w) } else { (w, h) };
    (0..sr)
        .map(|r| {
            (0..sc)
                .map(|c| match o {
                    1 => d[r][c],
                    2 => d[r][w - 1 - c],
                    3 => d[h - 1 - r][w - 1 - c],
                    4 => d[h - 1 - r][c],
                    5 => d[c][r],
                    6 => d[c][w - 1 - r],
                    7 => d[h - 1 - c][w - 1 - r],
                    8 => d[h - 1 - c][r],
                    _ => unreachable!(),
                })
                .collect()
        })
        .collect()
}

fn tiff16_with_orientation(path: &Path, s: &[Vec<u16>], o: u16) {
    use tiff::encoder::{colortype::Gray16, TiffEncoder};
    use tiff::tags::Tag;
    let (h, w) = (s.len(), s[0].len());
    let data: Vec<u16> = s.iter().flatten().copied().collect();
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let f = std::fs::File::create(path).unwrap();
    let mut enc = TiffEncoder::new(f).unwrap();
    let mut img = enc.new_image::<Gray16>(w as u32, h as u32).unwrap();
    img.encoder().write_tag(Tag::Orientation, o).unwrap();
    img.write_data(&data).unwrap();
}

#[test]
fn all_eight_orientations_give_the_upright_maps() {
    let t = TempDir::new().unwrap();
    let d = pattern(7, 11);
    for o in 1..=8u16 {
        tiff16_with_orientation(
            &t.path().join(format!("in/o{o}.tif")),
            &stored_for(o, &d),
            o,
        );
    }
    let out = t.path().join("o");
    tapmap()
        .args([
            "apply",
            "--bank",
            "sobel-x+sobel-y+identity",
            "--pad",
            "reflect",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(t.path().join("in"))
        .assert()
        .success();
    let upright = npy(&out.join("maps/o1.npy"));
    assert_eq!(upright.dim(), (3, 7, 11));
    for o in 2..=8 {
        let m = npy(&out.join(format!("maps/o{o}.npy")));
        assert_eq!(m, upright, "orientation {o}");
    }
    let rows = csv_rows(&out.join("images.csv"));
    assert_eq!(rows[5]["orientation"], "6");
    assert_eq!(rows[5]["width"], "7", "width as stored in the file");
    // Switched off, the stored layout is kept.
    let out2 = t.path().join("o2");
    tapmap()
        .args([
            "apply",
            "--bank",
            "identity",
            "--ignore-orientation",
            "-q",
            "-o",
        ])
        .arg(&out2)
        .arg(t.path().join("in/o6.tif"))
        .assert()
        .success();
    assert_eq!(npy(&out2.join("maps/o6.npy")).dim(), (1, 11, 7));
}

fn exif_jpeg(path: &Path, exif: Vec<u8>, w: u32, h: u32) {
    use image::{codecs::jpeg::JpegEncoder, ImageEncoder};
    let img = ImageBuffer::from_fn(w, h, |x, y| Rgb([(x * 9) as u8, (y * 5) as u8, 90u8]));
    let mut bytes = Vec::new();
    let mut enc = JpegEncoder::new_with_quality(&mut bytes, 95);
    enc.set_exif_metadata(exif).unwrap();
    enc.write_image(img.as_raw(), w, h, image::ExtendedColorType::Rgb8)
        .unwrap();
    std::fs::write(path, bytes).unwrap();
}

fn exif_block(orientation: u16) -> Vec<u8> {
    use exif::{experimental::Writer, Field, In, Rational, Tag, Value};
    let fields = [
        Field {
            tag: Tag::Orientation,
            ifd_num: In::PRIMARY,
            value: Value::Short(vec![orientation]),
        },
        Field {
            tag: Tag::DateTimeOriginal,
            ifd_num: In::PRIMARY,
            value: Value::Ascii(vec![b"2026:11:29 23:05:41".to_vec()]),
        },
        Field {
            tag: Tag::ExposureTime,
            ifd_num: In::PRIMARY,
            value: Value::Rational(vec![Rational { num: 1, denom: 125 }]),
        },
    ];
    let mut w = Writer::new();
    for f in &fields {
        w.push_field(f);
    }
    let mut buf = std::io::Cursor::new(Vec::new());
    w.write(&mut buf, false).unwrap();
    buf.into_inner()
}

#[test]
fn jpeg_exif_orientation_capture_time_and_exposure_are_applied_and_recorded() {
    let t = TempDir::new().unwrap();
    std::fs::create_dir_all(t.path().join("in")).unwrap();
    exif_jpeg(&t.path().join("in/turned.jpg"), exif_block(6), 32, 16);
    exif_jpeg(
        &t.path().join("in/bad-orientation.jpg"),
        exif_block(9),
        32,
        16,
    );
    exif_jpeg(
        &t.path().join("in/garbled.jpg"),
        b"this is no TIFF structure at all".to_vec(),
        32,
        16,
    );
    grey8(&t.path().join("in/plain.png"), 8, 8, 1);
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "identity", "-q", "-o"])
        .arg(&out)
        .arg(t.path().join("in"))
        .assert()
        .code(1);
    assert_eq!(
        npy(&out.join("maps/turned.npy")).dim(),
        (1, 32, 16),
        "rotated upright"
    );
    let rows = csv_rows(&out.join("images.csv"));
    let by = |name: &str| rows.iter().find(|r| r["path"] == name).unwrap().clone();
    let turned = by("turned.jpg");
    assert_eq!(
        (
            turned["orientation"].as_str(),
            turned["orientation_applied"].as_str()
        ),
        ("6", "true")
    );
    assert_eq!(turned["captured"], "2026-11-29T23:05:41");
    assert_eq!(turned["exposure_s"], "0.008");
    let bad = by("bad-orientation.jpg");
    assert_eq!(bad["status"], "failed");
    assert!(
        bad["error"].contains("orientation 9") && bad["error"].contains("--ignore-orientation"),
        "{}",
        bad["error"]
    );
    let garbled = by("garbled.jpg");
    assert!(
        garbled["error"].contains("EXIF block that does not parse"),
        "{}",
        garbled["error"]
    );
    assert_eq!(by("plain.png")["status"], "ok");
    assert!(!out.join("maps/garbled.npy").exists());
    // With orientation ignored both read as stored.
    let out2 = t.path().join("o2");
    tapmap()
        .args([
            "apply",
            "--bank",
            "identity",
            "--ignore-orientation",
            "-q",
            "-o",
        ])
        .arg(&out2)
        .arg(t.path().join("in"))
        .assert()
        .success();
    assert_eq!(npy(&out2.join("maps/turned.npy")).dim(), (1, 16, 32));
}

#[test]
fn sixteen_bit_levels_survive_and_white_scales() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("in/deep.png");
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    ImageBuffer::from_fn(4, 1, |x, _| Luma([[30000u16, 30001, 4095, 0][x as usize]]))
        .save(&p)
        .unwrap();
    let p8 = t.path().join("in/byte.png");
    ImageBuffer::from_fn(2, 1, |x, _| Luma([[255u8, 51][x as usize]]))
        .save(&p8)
        .unwrap();
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "identity", "-q", "-o"])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let m = npy(&out.join("maps/deep.npy"));
    // One count of 65535 shows: the maps keep all 16 bits.
    assert!(m[[0, 0, 1]] > m[[0, 0, 0]]);
    assert!(((m[[0, 0, 1]] - m[[0, 0, 0]]) as f64 - 1.0 / 65535.0).abs() < 1e-9);
    let out = t.path().join("o12");
    tapmap()
        .args(["apply", "--bank", "identity", "--white", "4095", "-q", "-o"])
        .arg(&out)
        .arg(t.path().join("in"))
        .assert()
        .success();
    let m = npy(&out.join("maps/deep.npy"));
    assert_eq!(m[[0, 0, 2]], 1.0, "4095 is white for 12-bit data");
    assert_eq!(
        m[[0, 0, 0]],
        30000.0 / 4095.0,
        "values above white are kept, not clipped"
    );
    let b = npy(&out.join("maps/byte.npy"));
    assert_eq!(
        b[[0, 0, 0]],
        1.0,
        "an 8-bit file cannot hold 4095, so it keeps 255"
    );
    let rows = csv_rows(&out.join("images.csv"));
    assert_eq!(
        (rows[0]["path"].as_str(), rows[0]["white"].as_str()),
        ("byte.png", "255")
    );
    assert_eq!(
        (rows[1]["white"].as_str(), rows[1]["bit_depth"].as_str()),
        ("4095", "16")
    );
}

#[test]
fn split_rgb_and_luma_colour_modes() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("c.png");
    ImageBuffer::from_fn(9, 6, |x, y| {
        Rgb([(x * 20) as u8, (y * 30) as u8, ((x + y) * 10) as u8])
    })
    .save(&p)
    .unwrap();
    let out = t.path().join("o");
    tapmap()
        .args([
            "apply",
            "--bank",
            "sobel-x+sobel-y",
            "--color",
            "split",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let names: Vec<String> = csv_rows(&out.join("stats.csv"))
        .iter()
        .map(|r| r["name"].clone())
        .collect();
    assert_eq!(
        names,
        [
            "sobel-x@r",
            "sobel-x@g",
            "sobel-x@b",
            "sobel-y@r",
            "sobel-y@g",
            "sobel-y@b"
        ]
    );
    let split = npy(&out.join("maps/c.npy"));
    // sobel-x@g equals sobel-x over the green channel alone: interior ramp of 0 per column.
    for y in 1..5 {
        for x in 1..8 {
            assert!(split[[1, y, x]].abs() < 1e-6, "({y},{x})");
        }
    }
    // sobel-x@r in the interior: 8 · 20/255.
    assert!((split[[0, 3, 4]] - 8.0 * 20.0 / 255.0).abs() < 1e-5);
    // A three-plane bank under rgb.
    let bank = t.path().join("rgb.toml");
    std::fs::write(
        &bank,
        "name = \"rgb\"\n[[kernel]]\nname = \"g-minus-r\"\nplanes = [[[-1.0]], [[1.0]], [[0.0]]]\n",
    )
    .unwrap();
    tapmap()
        .args(["apply", "--color", "rgb", "-q", "--bank"])
        .arg(&bank)
        .arg("-o")
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let m = npy(&out.join("maps/c.npy"));
    assert!(
        (m[[0, 2, 3]] - (60.0 - 60.0) / 255.0).abs() < 1e-6
            && (m[[0, 1, 4]] - (30.0 - 80.0) / 255.0).abs() < 1e-6
    );
    // Planes that do not match the colour mode: a clear set-up error.
    tapmap()
        .args(["apply", "--bank"])
        .arg(&bank)
        .arg("-o")
        .arg(&out)
        .arg(&p)
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "3 plane(s) but colour mode luma gives 1 channel; use --color rgb",
        ));
    // rgb on a grey image: that file fails, named.
    let g = t.path().join("g.png");
    grey8(&g, 4, 4, 1);
    tapmap()
        .args(["apply", "--color", "rgb", "--bank"])
        .arg(&bank)
        .arg("-o")
        .arg(&out)
        .arg(&g)
        .assert()
        .code(1)
        .stderr(predicate::str::contains(
            "g.png: is grey but colour mode rgb needs three colour channels",
        ));
}

/// Percentile by full sort and linear interpolation (Hyndman & Fan 1996, def. 7).
fn pct(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p / 100.0;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[test]
fn statistics_match_an_independent_computation() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("s.png");
    grey8(&p, 37, 23, 5);
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "--bank", "edges", "--threshold", "0.1", "-q", "-o"])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let maps = npy(&out.join("maps/s.npy"));
    let rows = csv_rows(&out.join("stats.csv"));
    assert_eq!(rows.len(), 3);
    for (c, row) in rows.iter().enumerate() {
        let mut v: Vec<f64> = maps
            .index_axis(ndarray::Axis(0), c)
            .iter()
            .map(|x| *x as f64)
            .collect();
        let n = v.len() as f64;
        let mean = v.iter().sum::<f64>() / n;
        let std = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n).sqrt();
        let zeros = v.iter().filter(|x| **x == 0.0).count() as f64 / n;
        let above = v.iter().filter(|x| **x > 0.1f32 as f64).count() as f64 / n;
        v.sort_by(f64::total_cmp);
        let want = [
            ("min", v[0]),
            ("max", v[v.len() - 1]),
            ("mean", mean),
            ("std", std),
            ("p01", pct(&v, 1.0)),
            ("p50", pct(&v, 50.0)),
            ("p99", pct(&v, 99.0)),
            ("zero_fraction", zeros),
            ("above_fraction", above),
        ];
        for (col, w) in want {
            let got: f64 = row[col].parse().unwrap();
            assert!(
                (got - w).abs() <= 1e-9 * w.abs().max(1.0),
                "channel {c} {col}: {got} vs {w}"
            );
        }
        assert_eq!(
            (
                row["width"].as_str(),
                row["height"].as_str(),
                row["channel"].as_str()
            ),
            ("37", "23", &*c.to_string())
        );
    }
}

#[test]
fn recipe_file_equals_its_stages_run_by_hand() {
    use tapmap::engine::{run_conv, Engine};
    use tapmap::stage::recipefile::read_recipe;
    use tapmap::stage::{Activation, Pool, PoolKind, PoolWindow, Stage};
    let t = TempDir::new().unwrap();
    let recipe = t.path().join("r.toml");
    std::fs::write(
        &recipe,
        "[input]\ncolor = \"luma\"\n\n[[stage]]\nconv = \"gaussian:sigma=1\"\npad = \"reflect\"\n\n[[stage]]\nact = \"leaky-relu\"\nslope = 0.2\n\n\
         [[stage]]\nconv = \"sobel-x+laplace-4\"\nextent = \"valid\"\nstride = [1, 2]\n\n[[stage]]\npool = \"mean\"\nsize = 2\n",
    )
    .unwrap();
    let spec = read_recipe(&recipe).unwrap();
    assert_eq!(spec.recipe.stages.len(), 4);
    let p = t.path().join("img.png");
    grey8(&p, 31, 20, 9);
    let img = tapmap::image_io::read_image(&p, &Default::default())
        .unwrap()
        .data;
    let Stage::Conv(c1) = &spec.recipe.stages[0] else {
        panic!()
    };
    let Stage::Conv(c2) = &spec.recipe.stages[2] else {
        panic!()
    };
    let mut x = run_conv(c1, &img, Engine::Reference).unwrap();
    x.mapv_inplace(|v| {
        let mut a = [v];
        Activation::LeakyRelu(0.2).apply(&mut a);
        a[0]
    });
    let x = run_conv(c2, &x, Engine::Reference).unwrap();
    let by_hand = Pool {
        kind: PoolKind::Mean,
        window: PoolWindow::Sized {
            size: (2, 2),
            stride: (2, 2),
        },
    }
    .apply(&x)
    .unwrap();
    let out = t.path().join("o");
    tapmap()
        .args(["apply", "-q", "--recipe"])
        .arg(&recipe)
        .arg("-o")
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let got = npy(&out.join("maps/img.npy"));
    assert_eq!(got.dim(), by_hand.dim());
    for (a, b) in got.iter().zip(by_hand.iter()) {
        assert!((a - b).abs() < 1e-5, "{a} vs {b}");
    }
    // A flag given with the recipe overrides the first conv stage.
    tapmap()
        .args(["apply", "-q", "--stride", "2", "--recipe"])
        .arg(&recipe)
        .arg("-o")
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    assert_eq!(npy(&out.join("maps/img.npy")).dim(), (2, 4, 3));
    // reckon prints every stage.
    tapmap()
        .args(["reckon", "--size", "31x20", "--recipe"])
        .arg(&recipe)
        .assert()
        .success()
        .stdout(predicate::str::contains("2×18×15").and(predicate::str::contains("2×9×7")));
    // Bad recipes: line and column, unknown keys.
    std::fs::write(&recipe, "[[stage]]\nconv = \"edges\"\npadd = \"zero\"\n").unwrap();
    tapmap()
        .args(["reckon", "--size", "9x9", "--recipe"])
        .arg(&recipe)
        .assert()
        .code(2)
        .stderr(predicate::str::contains("line 3").and(predicate::str::contains("padd")));
    std::fs::write(&recipe, "[[stage]]\nact = \"relu\"\npool = \"max\"\n").unwrap();
    tapmap()
        .args(["reckon", "--size", "9x9", "--recipe"])
        .arg(&recipe)
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "exactly one of conv, act, pool, combine or thin",
        ));
}

#[test]
fn views_and_manifest_let_a_level_be_turned_back_into_a_value() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("v.png");
    grey8(&p, 20, 14, 3);
    let out = t.path().join("o");
    tapmap()
        .args([
            "apply",
            "--bank",
            "box:size=3+sobel-x",
            "--save",
            "all",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).unwrap()).unwrap();
    let maps = npy(&out.join("maps/v.npy"));
    let views = manifest["inputs"][0]["views"].as_array().unwrap();
    assert_eq!(
        views[0]["scale"], "grey",
        "a box kernel on an image is non-negative"
    );
    assert_eq!(views[1]["scale"], "diverging", "sobel-x is signed");
    let (lo, hi) = (
        views[0]["lo"].as_f64().unwrap(),
        views[0]["hi"].as_f64().unwrap(),
    );
    let png = image::open(out.join(views[0]["file"].as_str().unwrap()))
        .unwrap()
        .to_luma8();
    for (x, y) in [(0, 0), (5, 7), (19, 13)] {
        let level = png.get_pixel(x, y)[0] as f64;
        let value = lo + level / 255.0 * (hi - lo);
        assert!(
            (value - maps[[0, y as usize, x as usize]] as f64).abs()
                <= 0.5 / 255.0 * (hi - lo) + 1e-9
        );
    }
    // Every output is listed with its size; the bank digest and command line are there.
    for o in manifest["inputs"][0]["outputs"].as_array().unwrap() {
        let len = std::fs::metadata(out.join(o["path"].as_str().unwrap()))
            .unwrap()
            .len();
        assert_eq!(o["bytes"].as_u64().unwrap(), len);
    }
    let stage = &manifest["recipe"]["stages"][0];
    assert_eq!(stage["bank_sha256"].as_str().unwrap().len(), 64);
    assert!(stage["bank_file"].as_str().unwrap().contains("[[kernel]]"));
    assert!(manifest["command_line"]
        .as_array()
        .unwrap()
        .iter()
        .any(|a| a == "box:size=3+sobel-x"));
    assert_eq!(
        manifest["views"]["diverging_table"]
            .as_array()
            .unwrap()
            .len(),
        256
    );
    // 16-bit grey views.
    tapmap()
        .args([
            "apply",
            "--bank",
            "box:size=3",
            "--view-depth",
            "16",
            "--view-range",
            "0,1",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let v16 = image::open(out.join("views/v/00-box_size=3.png")).unwrap();
    assert_eq!(v16.color(), image::ColorType::L16);
}

#[test]
fn results_do_not_depend_on_the_number_of_jobs() {
    let t = TempDir::new().unwrap();
    for i in 0..12 {
        grey8(
            &t.path().join(format!("in/{}/img{i:02}.png", i % 3)),
            40 + i,
            30,
            i,
        );
    }
    let run = |jobs: &str, name: &str| {
        let out = t.path().join(name);
        tapmap()
            .args([
                "apply",
                "--bank",
                "edges",
                "--save",
                "maps,views,stats",
                "-q",
                "--jobs",
                jobs,
                "-o",
            ])
            .arg(&out)
            .arg(t.path().join("in"))
            .assert()
            .success();
        out
    };
    // Every file (maps, views, both CSVs, the journal) byte for byte, whatever
    // the number of workers and the order they finish in.
    let files = |dir: &Path| -> Vec<(PathBuf, Vec<u8>)> {
        let mut v: Vec<(PathBuf, Vec<u8>)> = walkdir::WalkDir::new(dir)
            .into_iter()
            .map(|e| e.unwrap())
            .filter(|e| e.file_type().is_file() && e.file_name() != "manifest.json")
            .map(|e| {
                let rel = e.path().strip_prefix(dir).unwrap().to_path_buf();
                let bytes = crate::common::without_times(&rel, &std::fs::read(e.path()).unwrap());
                (rel, bytes)
            })
            .collect();
        v.sort();
        v
    };
    let a = files(&run("1", "a"));
    assert_eq!(
        a.len(),
        12 * 4 + 3,
        "maps, views, stats.csv, images.csv, journal"
    );
    for (jobs, name) in [("2", "b"), ("5", "c")] {
        let b = files(&run(jobs, name));
        assert_eq!(a.len(), b.len());
        for ((pa, da), (pb, db)) in a.iter().zip(&b) {
            assert_eq!(pa, pb);
            assert!(da == db, "{} differs with --jobs {jobs}", pa.display());
        }
    }
}

#[test]
fn bad_files_are_recorded_and_leave_no_partial_output() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    grey8(&inp.join("good.png"), 16, 12, 1);
    let good = std::fs::read(inp.join("good.png")).unwrap();
    std::fs::write(inp.join("truncated.png"), &good[..good.len() - 30]).unwrap();
    std::fs::write(inp.join("empty.png"), b"").unwrap();
    std::fs::write(inp.join("text.jpg"), "shift report: line A ran 7 hours").unwrap();
    // A PNG whose header claims zero width.
    let mut zero = good[..33].to_vec();
    zero[16..20].copy_from_slice(&0u32.to_be_bytes());
    std::fs::write(inp.join("zero-width.png"), zero).unwrap();
    let out = t.path().join("o");
    let assert = tapmap()
        .args(["apply", "--bank", "edges", "--save", "all", "-o"])
        .arg(&out)
        .arg(&inp)
        .assert()
        .code(1);
    let err = String::from_utf8_lossy(&assert.get_output().stderr).into_owned();
    assert!(err.contains("1 processed, 4 failed"), "{err}");
    let rows = csv_rows(&out.join("images.csv"));
    assert_eq!(rows.len(), 5);
    for r in &rows {
        if r["path"] == "good.png" {
            assert_eq!(r["status"], "ok");
        } else {
            assert_eq!(r["status"], "failed", "{}", r["path"]);
            assert!(!r["error"].is_empty());
            assert!(err.contains(&*r["path"]), "stderr names {}", r["path"]);
        }
    }
    let mut leftovers = Vec::new();
    for e in walkdir::WalkDir::new(&out) {
        let e = e.unwrap();
        let name = e.file_name().to_string_lossy();
        if name.starts_with(".tapmap") || name.ends_with(".part") {
            leftovers.push(e.path().to_path_buf());
        }
        for bad in ["truncated", "empty", "text", "zero-width"] {
            assert!(
                !name.starts_with(bad),
                "output for a failed input: {}",
                e.path().display()
            );
        }
    }
    assert!(leftovers.is_empty(), "{leftovers:?}");
    let _: PathBuf = out;
}

#[test]
fn float_tiff_maps_read_back_exactly_as_float_input() {
    let t = TempDir::new().unwrap();
    let p = t.path().join("src.png");
    grey8(&p, 19, 11, 4);
    let out = t.path().join("o");
    tapmap()
        .args([
            "apply",
            "--bank",
            "sobel-x+laplace-4",
            "--save",
            "maps,tiff",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(&p)
        .assert()
        .success();
    let maps = npy(&out.join("maps/src.npy"));
    // A signed float map goes back in as it is: no scaling, no clipping.
    // (copied out first: tapmap never reads a run folder's files as input)
    let back = t.path().join("back");
    let tif = t.path().join("00-sobel-x.tif");
    std::fs::copy(out.join("tiff/src/00-sobel-x.tif"), &tif).unwrap();
    tapmap()
        .args(["apply", "--bank", "identity", "-q", "-o"])
        .arg(&back)
        .arg(&tif)
        .assert()
        .success();
    let again = npy(&back.join("maps/00-sobel-x.npy"));
    assert!(maps
        .index_axis(ndarray::Axis(0), 0)
        .iter()
        .zip(again.iter())
        .all(|(a, b)| a.to_bits() == b.to_bits()));
    assert!(again.iter().any(|v| *v < 0.0));
    let rows = csv_rows(&back.join("images.csv"));
    assert_eq!(
        (
            rows[0]["bit_depth"].as_str(),
            rows[0]["sample"].as_str(),
            rows[0]["white"].as_str()
        ),
        ("32", "float", "")
    );
}

#[test]
fn npy_arrays_go_in_as_images() {
    use ndarray::{Array2, Array4};
    use ndarray_npy::WriteNpyExt;
    let t = TempDir::new().unwrap();
    let dir = t.path().join("arrays");
    std::fs::create_dir_all(&dir).unwrap();
    let save =
        |name: &str, f: &dyn Fn(std::fs::File)| f(std::fs::File::create(dir.join(name)).unwrap());
    save("deep.npy", &|f| {
        Array2::from_shape_fn((3, 4), |(y, x)| (y * 1000 + x) as u16)
            .write_npy(f)
            .unwrap()
    });
    save("byte.npy", &|f| {
        Array2::from_shape_fn((2, 2), |(y, x)| (y * 2 + x) as u8 * 50)
            .write_npy(f)
            .unwrap()
    });
    save("colour.npy", &|f| {
        Array3::from_shape_fn((3, 2, 3), |(c, y, x)| {
            [0.5f32, -1.0, 2.0][c] + (y + x) as f32
        })
        .write_npy(f)
        .unwrap()
    });
    save("signed.npy", &|f| {
        Array2::from_shape_fn((2, 3), |(y, x)| x as f64 - 1.5 - y as f64)
            .write_npy(f)
            .unwrap()
    });
    save("weights.npy", &|f| {
        Array4::<f32>::zeros((2, 1, 3, 3)).write_npy(f).unwrap()
    });
    let out = t.path().join("o");
    // A folder walk does not pick arrays up; a pattern naming .npy does.
    tapmap()
        .args(["apply", "--bank", "identity", "-o"])
        .arg(&out)
        .arg(&dir)
        .assert()
        .code(2)
        .stderr(predicate::str::contains("holds no image files"));
    let a = tapmap()
        .args(["apply", "--bank", "identity", "-o"])
        .arg(&out)
        .arg(format!("{}/*.npy", dir.display()))
        .assert()
        .code(1);
    let err = String::from_utf8_lossy(&a.get_output().stderr).into_owned();
    assert!(
        err.contains("weights.npy: is an array of shape [2, 1, 3, 3]; images are H×W or C×H×W"),
        "{err}"
    );
    let deep = npy(&out.join("maps/deep.npy"));
    assert_eq!(deep.dim(), (1, 3, 4));
    assert_eq!(deep[[0, 2, 3]], 2003.0 / 65535.0, "uint16 by full scale");
    assert_eq!(npy(&out.join("maps/byte.npy"))[[0, 1, 1]], 150.0 / 255.0);
    let colour = npy(&out.join("maps/colour.npy"));
    let want = 0.2126f32 * 1.5 + 0.7152 * 0.0 + 0.0722 * 3.0;
    assert!(
        (colour[[0, 1, 0]] - want).abs() < 1e-6,
        "float arrays as they are, BT.709 luma"
    );
    assert_eq!(
        npy(&out.join("maps/signed.npy"))[[0, 1, 0]],
        -2.5,
        "negative floats kept"
    );
    let rows = csv_rows(&out.join("images.csv"));
    let deep_row = rows.iter().find(|r| r["path"] == "deep.npy").unwrap();
    assert_eq!(
        (
            deep_row["bit_depth"].as_str(),
            deep_row["white"].as_str(),
            deep_row["sample"].as_str()
        ),
        ("16", "65535", "int")
    );
    // --white and split channels.
    let out2 = t.path().join("o2");
    tapmap()
        .args([
            "apply", "--bank", "identity", "--white", "4095", "--color", "split", "-q", "-o",
        ])
        .arg(&out2)
        .arg(dir.join("deep.npy"))
        .arg(dir.join("colour.npy"))
        .assert()
        .success();
    assert_eq!(npy(&out2.join("maps/deep.npy"))[[0, 2, 3]], 2003.0 / 4095.0);
    let names: Vec<String> = csv_rows(&out2.join("stats.csv"))
        .iter()
        .filter(|r| r["path"] == "colour.npy")
        .map(|r| r["name"].clone())
        .collect();
    assert_eq!(names, ["identity@r", "identity@g", "identity@b"]);
}

#[test]
fn names_that_would_escape_the_output_folder_are_made_safe() {
    // Kernel names become file names of views and TIFFs; input names become
    // output paths. None may lead outside --out, whatever they contain.
    let t = TempDir::new().unwrap();
    let bank = t.path().join("odd.toml");
    std::fs::write(
        &bank,
        "name = \"../../bank\"\nop = \"correlate\"\n\
         [[kernel]]\nname = \"../../../escaped\"\nfamily = \"sobel-x\"\n\
         [[kernel]]\nname = \"/etc/abs\"\nfamily = \"sobel-y\"\n\
         [[kernel]]\nname = \"a\\\\b:c*?<>|\\\"d\"\nfamily = \"box\"\n",
    )
    .unwrap();
    let inp = t.path().join("in");
    grey8(&inp.join("..dots.png"), 9, 7, 1);
    grey8(&inp.join("sub/x.png"), 9, 7, 2);
    // Dots inside a name are kept: two versions of a tile write two maps.
    grey8(&inp.join("tile.v2.png"), 9, 7, 3);
    grey8(&inp.join("tile.v3.png"), 9, 7, 4);
    let work = t.path().join("work");
    std::fs::create_dir_all(&work).unwrap();
    let out = work.join("out");
    tapmap()
        .args(["apply", "--save", "all", "-q", "--bank"])
        .arg(&bank)
        .arg("-o")
        .arg(&out)
        .arg(&inp)
        .assert()
        .success();
    // Everything the run wrote is below `out`; `work` holds nothing else.
    let entries: Vec<_> = std::fs::read_dir(&work)
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(entries, vec![std::ffi::OsString::from("out")]);
    let mut names = Vec::new();
    for e in walkdir::WalkDir::new(t.path()) {
        let e = e.unwrap();
        if e.file_type().is_file() {
            let p = e.path();
            assert!(
                p.starts_with(&out) || p.starts_with(&inp) || p == bank,
                "written outside --out: {}",
                p.display()
            );
            if p.starts_with(out.join("views")) {
                names.push(p.file_name().unwrap().to_string_lossy().into_owned());
            }
        }
    }
    names.sort();
    names.dedup();
    for n in &names {
        assert!(
            n.chars()
                .all(|c| c.is_ascii_alphanumeric() || "-_.@=+".contains(c)),
            "unsafe file name {n}"
        );
        assert!(!n.contains(".."), "{n}");
    }
    assert_eq!(names.len(), 3, "{names:?}");
    for m in ["..dots.npy", "sub/x.npy", "tile.v2.npy", "tile.v3.npy"] {
        assert!(out.join("maps").join(m).is_file(), "{m}");
    }
}

#[test]
fn pixel_and_memory_limits_refuse_one_image_and_keep_going() {
    let t = TempDir::new().unwrap();
    grey8(&t.path().join("in/big.png"), 64, 64, 1);
    grey8(&t.path().join("in/small.png"), 8, 8, 2);
    // (flags, what the big image's message must say). Sizes for a 64×64 8-bit
    // grey image: decoding takes 4096 B of samples + 16 B a pixel of planes
    // (68 KiB); the edges bank under `same` holds the 16 KiB input, its padded
    // copy (66×66×4 B) and three 16 KiB maps (about 81 KiB).
    for (flags, says) in [
        (
            ["--max-pixels", "1000"],
            "64×64 = 4,096 pixels, over the limit of 1,000 pixels",
        ),
        (
            ["--max-memory", "10K"],
            "to decode, over --max-memory (10.0 KiB)",
        ),
        (
            ["--max-memory", "75K"],
            "to run the recipe on its 64×64 pixels, over --max-memory (75.0 KiB)",
        ),
    ] {
        let out = t.path().join(format!("out{}", flags[1]));
        let a = tapmap()
            .args(["apply", "--bank", "edges", "-q"])
            .args(flags)
            .arg("-o")
            .arg(&out)
            .arg(t.path().join("in"))
            .assert()
            .code(1);
        let err = String::from_utf8_lossy(&a.get_output().stderr).into_owned();
        assert!(
            err.contains("big.png") && err.contains(says),
            "{flags:?}: {err}"
        );
        assert!(out.join("maps/small.npy").is_file());
        assert!(!out.join("maps/big.npy").exists());
    }
}
