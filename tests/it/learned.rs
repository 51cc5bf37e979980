//! Learned banks: weight readers against the published formats, import options,
//! normalisation, drawing taps, and the probe.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

use std::io::Write;
use std::path::{Path, PathBuf};

use assert_cmd::cargo::cargo_bin_cmd;
use predicates::prelude::*;
use tapmap::kernel::import::{import_bank, ImportOptions, Layout};
use tapmap::kernel::tensors::{list_tensors, npy_tensor, read_tensor};
use tempfile::TempDir;

/// `.npy` bytes as NumPy's format description lays them out (numpy.lib.format):
/// magic, version, header length (2 bytes for 1.0, 4 for 2.0), dict header
/// padded with spaces and ended by '\n' so the data starts at a multiple of 64.
fn npy(version: u8, descr: &str, fortran: bool, shape: &str, data: &[u8]) -> Vec<u8> {
    let pre = if version == 1 { 10 } else { 12 };
    let mut h = format!(
        "{{'descr': '{descr}', 'fortran_order': {}, 'shape': {shape}, }}",
        if fortran { "True" } else { "False" }
    );
    while (pre + h.len() + 1) % 64 != 0 {
        h.push(' ');
    }
    h.push('\n');
    let mut out = b"\x93NUMPY".to_vec();
    out.push(version);
    out.push(0);
    if version == 1 {
        out.extend((h.len() as u16).to_le_bytes());
    } else {
        out.extend((h.len() as u32).to_le_bytes());
    }
    out.extend(h.as_bytes());
    out.extend(data);
    out
}

#[test]
fn npy_v1_little_endian_c_order() {
    let vals = [1.5f32, -2.0, 0.25, 3.0, 0.0, -0.5];
    let data: Vec<u8> = vals.iter().flat_map(|v| v.to_le_bytes()).collect();
    let t = npy_tensor(&npy(1, "<f4", false, "(2, 3)", &data), "w").unwrap();
    assert_eq!(t.shape, vec![2, 3]);
    assert_eq!(t.data, vals);
}

#[test]
fn npy_v2_big_endian_fortran_order_float64() {
    // Logical 2×3 array [[1,2,3],[4,5,6]] stored column-major: 1 4 2 5 3 6.
    let stored = [1.0f64, 4.0, 2.0, 5.0, 3.0, 6.0];
    let data: Vec<u8> = stored.iter().flat_map(|v| v.to_be_bytes()).collect();
    let t = npy_tensor(&npy(2, ">f8", true, "(2, 3)", &data), "w").unwrap();
    assert_eq!(t.data, vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]);
    // Three dimensions, Fortran order: element (i, j, k) at i + 2j + 4k.
    let logical: Vec<f32> = (0..8).map(|v| v as f32).collect();
    let mut f_order = [0f32; 8];
    for i in 0..2 {
        for j in 0..2 {
            for k in 0..2 {
                f_order[i + 2 * j + 4 * k] = logical[i * 4 + j * 2 + k];
            }
        }
    }
    let data: Vec<u8> = f_order.iter().flat_map(|v| v.to_le_bytes()).collect();
    assert_eq!(
        npy_tensor(&npy(1, "<f4", true, "(2, 2, 2)", &data), "w")
            .unwrap()
            .data,
        logical
    );
}

#[test]
fn npy_float16_both_byte_orders() {
    // IEEE 754 binary16: 0x3C00 = 1.0, 0xC000 = −2.0, 0x3800 = 0.5.
    let le = [0x00u8, 0x3C, 0x00, 0xC0, 0x00, 0x38];
    assert_eq!(
        npy_tensor(&npy(1, "<f2", false, "(3,)", &le), "w")
            .unwrap()
            .data,
        vec![1.0, -2.0, 0.5]
    );
    let be = [0x3Cu8, 0x00, 0xC0, 0x00, 0x38, 0x00];
    assert_eq!(
        npy_tensor(&npy(1, ">f2", false, "(3,)", &be), "w")
            .unwrap()
            .data,
        vec![1.0, -2.0, 0.5]
    );
}

#[test]
fn npy_bad_headers_are_errors_not_panics() {
    let good = npy(1, "<f4", false, "(4,)", &[0u8; 16]);
    let cases: Vec<(Vec<u8>, &str)> = vec![
        (good[..8].to_vec(), "NumPy"),
        (good[..30].to_vec(), "truncated inside its header"),
        (good[..good.len() - 4].to_vec(), "claims 16 bytes of data"),
        (
            [good.as_slice(), &[0u8; 4]].concat(),
            "4 bytes after its data",
        ),
        (npy(1, "<i4", false, "(4,)", &[0u8; 16]), "dtype 'i4'"),
        (
            npy(1, "<f4", false, "(400000000, 400000000, 400000000)", &[]),
            "overflows",
        ),
        (npy(9, "<f4", false, "(4,)", &[0u8; 16]), "version 9"),
        (b"not numpy at all".to_vec(), "NumPy"),
    ];
    for (bytes, needle) in cases {
        let e = npy_tensor(&bytes, "w").unwrap_err();
        assert!(e.contains(needle), "{e} (wanted '{needle}')");
    }
}

/// A safetensors file as its format description lays it out: 8-byte little-endian
/// header size, JSON header of name → {dtype, shape, data_offsets}, then the buffer.
fn safetensors_bytes() -> Vec<u8> {
    let header = r#"{"bias":{"dtype":"F32","shape":[2],"data_offsets":[0,8]},"w":{"dtype":"BF16","shape":[2,1,1,2],"data_offsets":[8,16]}}"#;
    let mut h = header.to_string();
    while h.len() % 8 != 0 {
        h.push(' ');
    }
    let mut out = (h.len() as u64).to_le_bytes().to_vec();
    out.extend(h.as_bytes());
    out.extend(0.5f32.to_le_bytes());
    out.extend((-1.0f32).to_le_bytes());
    // bfloat16 is the upper half of an f32: 1.0 = 0x3F80, −3.0 = 0xC040, 0.5 = 0x3F00, 2.0 = 0x4000.
    for v in [0x3F80u16, 0xC040, 0x3F00, 0x4000] {
        out.extend(v.to_le_bytes());
    }
    out
}

fn write(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, bytes).unwrap();
    p
}

#[test]
fn safetensors_with_two_tensors() {
    let t = TempDir::new().unwrap();
    let p = write(t.path(), "m.safetensors", &safetensors_bytes());
    let names: Vec<String> = list_tensors(&p)
        .unwrap()
        .iter()
        .map(|i| i.to_string())
        .collect();
    assert_eq!(names, ["bias [2] F32", "w [2×1×1×2] BF16"]);
    assert_eq!(
        read_tensor(&p, Some("w")).unwrap().data,
        vec![1.0, -3.0, 0.5, 2.0]
    );
    // The only 4-D tensor is taken without a name.
    let bank = import_bank(
        &p,
        &ImportOptions {
            bias: Some("bias".into()),
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!(bank.kernels.len(), 2);
    assert_eq!(bank.kernels[1].planes[0], vec![0.5, 2.0]);
    assert_eq!((bank.kernels[0].bias, bank.kernels[1].bias), (0.5, -1.0));
    assert_eq!(
        bank.op,
        tapmap::kernel::Op::Correlate,
        "network layers correlate"
    );
    // A header that claims more data than the file holds.
    let mut short = safetensors_bytes();
    short.truncate(short.len() - 4);
    let p2 = write(t.path(), "short.safetensors", &short);
    assert!(read_tensor(&p2, Some("w")).is_err());
}

fn npz(dir: &Path, members: &[(&str, Vec<u8>)]) -> PathBuf {
    let p = dir.join("w.npz");
    let mut z = zip::ZipWriter::new(std::fs::File::create(&p).unwrap());
    for (name, bytes) in members {
        z.start_file(
            format!("{name}.npy"),
            zip::write::SimpleFileOptions::default()
                .compression_method(zip::CompressionMethod::Stored),
        )
        .unwrap();
        z.write_all(bytes).unwrap();
    }
    z.finish().unwrap();
    p
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

#[test]
fn npz_candidates_are_listed_rather_than_guessed() {
    let t = TempDir::new().unwrap();
    let w: Vec<f32> = (0..18).map(|v| v as f32 / 10.0).collect();
    let p = npz(
        t.path(),
        &[
            (
                "conv1",
                npy(1, "<f4", false, "(2, 1, 3, 3)", &f32_bytes(&w)),
            ),
            (
                "conv2",
                npy(1, "<f4", false, "(1, 2, 3, 3)", &f32_bytes(&w)),
            ),
            ("b", npy(1, "<f4", false, "(2,)", &f32_bytes(&[1.0, 2.0]))),
        ],
    );
    let e = read_tensor(&p, None).unwrap_err().to_string();
    assert!(
        e.contains("holds 3 tensors")
            && e.contains("conv1 [2×1×3×3] <f4")
            && e.contains("b [2] <f4"),
        "{e}"
    );
    let b = import_bank(
        &p,
        &ImportOptions {
            tensor: Some("conv2".into()),
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!((b.kernels.len(), b.kernels[0].channels()), (1, 2));
    let e = import_bank(
        &p,
        &ImportOptions {
            tensor: Some("conv2".into()),
            bias: Some("b".into()),
            ..Default::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.contains("bias b has shape [2] but the weights have 1 output channels"),
        "{e}"
    );
    let e = import_bank(
        &p,
        &ImportOptions {
            tensor: Some("b".into()),
            ..Default::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("1 dimensions"), "{e}");
}

#[test]
fn oihw_and_hwio_give_the_same_bank() {
    let t = TempDir::new().unwrap();
    let (o, i, kh, kw) = (3usize, 2usize, 3usize, 4usize);
    let val = |n: usize, c: usize, y: usize, x: usize| (n * 1000 + c * 100 + y * 10 + x) as f32;
    let mut oihw = Vec::new();
    for n in 0..o {
        for c in 0..i {
            for y in 0..kh {
                for x in 0..kw {
                    oihw.push(val(n, c, y, x));
                }
            }
        }
    }
    let mut hwio = Vec::new();
    for y in 0..kh {
        for x in 0..kw {
            for c in 0..i {
                for n in 0..o {
                    hwio.push(val(n, c, y, x));
                }
            }
        }
    }
    let a = write(
        t.path(),
        "a.npy",
        &npy(1, "<f4", false, "(3, 2, 3, 4)", &f32_bytes(&oihw)),
    );
    let b = write(
        t.path(),
        "b.npy",
        &npy(1, "<f4", false, "(3, 4, 2, 3)", &f32_bytes(&hwio)),
    );
    let ba = import_bank(&a, &ImportOptions::default()).unwrap();
    let bb = import_bank(
        &b,
        &ImportOptions {
            layout: Layout::Hwio,
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!(ba.kernels, bb.kernels);
    assert_eq!(ba.kernels[2].tap(1, 2, 3), 2123.0);
}

#[test]
fn bad_weights_and_options_are_named() {
    let t = TempDir::new().unwrap();
    let nan = write(
        t.path(),
        "nan.npy",
        &npy(
            1,
            "<f4",
            false,
            "(1, 1, 1, 2)",
            &f32_bytes(&[1.0, f32::NAN]),
        ),
    );
    let e = import_bank(&nan, &ImportOptions::default())
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("non-finite tap NaN") && e.contains(".npy"),
        "{e}"
    );
    let zero = write(
        t.path(),
        "zero.npy",
        &npy(1, "<f4", false, "(0, 1, 3, 3)", &[]),
    );
    assert!(import_bank(&zero, &ImportOptions::default())
        .unwrap_err()
        .to_string()
        .contains("zero-sized"));
    let ok = write(
        t.path(),
        "ok.npy",
        &npy(
            1,
            "<f4",
            false,
            "(1, 3, 1, 1)",
            &f32_bytes(&[1.0, 2.0, 3.0]),
        ),
    );
    let e = import_bank(
        &ok,
        &ImportOptions {
            mean: Some(vec![0.5]),
            std: Some(vec![0.2]),
            ..Default::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.contains("1 mean and 1 std values but the kernels take 3"),
        "{e}"
    );
    let e = import_bank(
        &ok,
        &ImportOptions {
            mean: Some(vec![0.5; 3]),
            std: Some(vec![0.2, 0.0, 0.1]),
            ..Default::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("std 0 must be finite and non-zero"), "{e}");
    let e = import_bank(
        &ok,
        &ImportOptions {
            mean: Some(vec![0.5; 3]),
            ..Default::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("--mean and --std together"), "{e}");
    for bad in [&nan, &zero] {
        assert!(import_bank(bad, &ImportOptions::default())
            .unwrap_err()
            .to_string()
            .contains(bad.file_name().unwrap().to_str().unwrap()));
    }
}

#[test]
fn import_command_writes_a_bank_that_keeps_normalisation_and_applies_it() {
    let t = TempDir::new().unwrap();
    // One 1×1 kernel with tap 1: the map is the normalised input.
    let w = write(
        t.path(),
        "id.npy",
        &npy(1, "<f4", false, "(1, 1, 1, 1)", &f32_bytes(&[1.0])),
    );
    let bank = t.path().join("id.toml");
    cargo_bin_cmd!("tapmap")
        .args(["bank", "import"])
        .arg(&w)
        .args(["--mean", "0.5", "--std", "0.25", "-o"])
        .arg(&bank)
        .assert()
        .success();
    let text = std::fs::read_to_string(&bank).unwrap();
    assert!(
        text.contains("normalize") && text.contains("op = \"correlate\""),
        "{text}"
    );
    let img = t.path().join("g.png");
    image::ImageBuffer::from_fn(4, 2, |x, _| image::Luma([[0u8, 51, 255, 102][x as usize]]))
        .save(&img)
        .unwrap();
    let out = t.path().join("o");
    cargo_bin_cmd!("tapmap")
        .args(["apply", "-q", "--bank"])
        .arg(&bank)
        .arg("-o")
        .arg(&out)
        .arg(&img)
        .assert()
        .success();
    let m = ndarray::Array3::<f32>::read_npy_file(&out.join("maps/g.npy"));
    let want = [
        (0.0 - 0.5) / 0.25,
        (0.2 - 0.5) / 0.25,
        (1.0 - 0.5) / 0.25,
        (0.4 - 0.5) / 0.25,
    ];
    for x in 0..4 {
        assert!(
            (m[[0, 0, x]] - want[x]).abs() < 1e-5,
            "{x}: {}",
            m[[0, 0, x]]
        );
    }
    // Weight files also go straight into --bank, with FILE:TENSOR.
    let st = write(t.path(), "m.safetensors", &safetensors_bytes());
    cargo_bin_cmd!("tapmap")
        .args(["reckon", "--size", "8x8", "--bank"])
        .arg(format!("{}:w", st.display()))
        .assert()
        .success()
        .stdout(predicate::str::contains("2×8×8"));
    cargo_bin_cmd!("tapmap")
        .args(["reckon", "--size", "8x8", "--bank"])
        .arg(format!("{}:nope", st.display()))
        .assert()
        .code(2)
        .stderr(predicate::str::contains(
            "has no tensor 'nope'; it holds: bias [2] F32; w [2×1×1×2] BF16",
        ));
}

trait ReadNpyFile {
    fn read_npy_file(p: &Path) -> Self;
}

impl ReadNpyFile for ndarray::Array3<f32> {
    fn read_npy_file(p: &Path) -> Self {
        use ndarray_npy::ReadNpyExt;
        ndarray::Array3::<f32>::read_npy(std::fs::File::open(p).unwrap()).unwrap()
    }
}

#[test]
fn drawn_taps_show_one_square_per_tap_in_the_right_colour() {
    use tapmap::kernel::{Bank, Kernel, Op};
    use tapmap::render::colormap::{table, POSITIVE};
    let mut k =
        Kernel::from_rows("one", &[vec![0.0, 0.0, 2.0], vec![0.0; 3], vec![0.0; 3]]).unwrap();
    let pic = tapmap::render::taps::taps_picture(&k, &table());
    assert_eq!(
        pic.get_pixel(2, 0).0,
        POSITIVE,
        "the positive tap is the positive end of the scale"
    );
    assert_eq!(
        pic.get_pixel(0, 0).0,
        table()[128],
        "zero is the scale's centre"
    );
    let bank = Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "b".into(),
        op: Op::Correlate,
        description: None,
        kernels: vec![k.clone()],
    };
    let sheet = tapmap::render::taps::draw_bank(&bank);
    // Enlarged by nearest neighbour: one square of 64×64 (192 / 3) pixels, of
    // which a one-pixel grid line takes a row and a column.
    let n = sheet.pixels().filter(|p| p.0 == POSITIVE).count();
    assert_eq!(
        n,
        63 * 63 + 12,
        "the tap's square inside the grid plus the legend's last column"
    );
    k.planes = vec![
        vec![0.0, 0.0, 2.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
        vec![0.0; 9],
        vec![0.0; 9],
    ];
    let rgb = tapmap::render::taps::taps_picture(&k, &table());
    assert_eq!(rgb.get_pixel(2, 0).0, [255, 128, 128]);
    assert_eq!(rgb.get_pixel(1, 1).0, [128, 128, 128], "grey means zero");
}

/// A smooth image with bright horizontal bars (1×5) centred at `bars`.
fn bar_image(path: &Path, bars: &[(usize, usize, u16)]) {
    let img = image::ImageBuffer::from_fn(64, 48, |x, y| {
        let mut v = 20000u16 + (x as u16) * 40 + (y as u16) * 25;
        for &(by, bx, add) in bars {
            if y as usize == by && (x as usize).abs_diff(bx) <= 2 {
                v += add;
            }
        }
        image::Luma([v])
    });
    img.save(path).unwrap();
}

fn probe_rows(out: &Path) -> Vec<Vec<String>> {
    let mut r = csv::Reader::from_path(out.join("probe.csv")).unwrap();
    r.records()
        .map(|x| x.unwrap().iter().map(String::from).collect())
        .collect()
}

#[test]
fn probe_finds_planted_bars_at_their_coordinates() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    std::fs::create_dir_all(&inp).unwrap();
    bar_image(&inp.join("a.png"), &[(21, 31, 9000)]);
    bar_image(&inp.join("b.png"), &[(13, 45, 6000), (35, 9, 3000)]);
    let bank = t.path().join("bars.toml");
    std::fs::write(
        &bank,
        "name = \"bars\"\n[[kernel]]\nname = \"horizontal\"\ntaps = [[-0.5,-0.5,-0.5,-0.5,-0.5],[1,1,1,1,1],[-0.5,-0.5,-0.5,-0.5,-0.5]]\n\
         [[kernel]]\nname = \"vertical\"\ntaps = [[-0.5,1,-0.5],[-0.5,1,-0.5],[-0.5,1,-0.5],[-0.5,1,-0.5],[-0.5,1,-0.5]]\n",
    )
    .unwrap();
    let run = |extra: &[&str], name: &str| {
        let out = t.path().join(name);
        cargo_bin_cmd!("tapmap")
            .args([
                "probe",
                "-q",
                "--top",
                "3",
                "--act",
                "relu",
                "--pad",
                "replicate",
                "--bank",
            ])
            .arg(&bank)
            .args(extra)
            .arg("-o")
            .arg(&out)
            .arg(&inp)
            .assert()
            .success();
        probe_rows(&out)
    };
    // (Replicate padding, so the image border does not outshine the bars.)
    // Columns: channel, kernel, rank, path, x, y, response, box_x, box_y, box_w, box_h, clipped.
    let rows = run(&[], "s1");
    let horiz: Vec<&Vec<String>> = rows.iter().filter(|r| r[1] == "horizontal").collect();
    let top: Vec<(&str, &str, &str)> = horiz
        .iter()
        .map(|r| (r[3].as_str(), r[4].as_str(), r[5].as_str()))
        .collect();
    assert_eq!(
        top,
        [
            ("a.png", "31", "21"),
            ("b.png", "45", "13"),
            ("b.png", "9", "35")
        ],
        "strongest bar first"
    );
    // The box is the receptive field: 3 rows × 5 columns centred on the hit
    // (same extent, stride 1: padding 1 and 2 before; Dumoulin & Visin 2016).
    assert_eq!(&horiz[0][7..12], ["29", "20", "5", "3", "false"]);
    // Stride 2: `same` pads (0 rows, 1 column) before, so output (y, x) reads rows
    // 2y.. 2y+2 and columns 2x−1.. 2x+3; the bar centred at (21, 31) is output (10, 15).
    let rows = run(&["--stride", "2"], "s2");
    let h = rows.iter().find(|r| r[1] == "horizontal").unwrap();
    assert_eq!(
        (h[3].as_str(), h[4].as_str(), h[5].as_str()),
        ("a.png", "15", "10")
    );
    assert_eq!(&h[7..11], ["29", "20", "5", "3"]);
    // Two stages: a 3×3 binomial blur first (its peak stays on the bar) widens the
    // field to 5×7, offset (2, 3).
    let recipe = t.path().join("r.toml");
    std::fs::write(&recipe, format!("[[stage]]\nconv = \"binomial:size=3\"\npad = \"replicate\"\n[[stage]]\nconv = \"{}\"\npad = \"replicate\"\n[[stage]]\nact = \"relu\"\n", bank.display())).unwrap();
    let out = t.path().join("s3");
    cargo_bin_cmd!("tapmap")
        .args(["probe", "-q", "--top", "2", "--recipe"])
        .arg(&recipe)
        .arg("-o")
        .arg(&out)
        .arg(&inp)
        .assert()
        .success();
    let rows = probe_rows(&out);
    let h = rows.iter().find(|r| r[1] == "horizontal").unwrap();
    assert_eq!(
        (h[3].as_str(), h[4].as_str(), h[5].as_str()),
        ("a.png", "31", "21")
    );
    assert_eq!(&h[7..11], ["28", "19", "7", "5"]);
    assert!(out.join("overview.png").is_file() && out.join("kernels/00-horizontal.png").is_file());
}

#[test]
fn probe_is_the_same_for_any_number_of_jobs_and_rejects_top_zero() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    std::fs::create_dir_all(&inp).unwrap();
    for i in 0..7usize {
        bar_image(
            &inp.join(format!("i{i}.png")),
            &[(5 + i * 5, 10 + i * 6, 2000 + (i as u16 % 3) * 1000)],
        );
    }
    let run = |jobs: &str| {
        let out = t.path().join(format!("j{jobs}"));
        cargo_bin_cmd!("tapmap")
            .args([
                "probe", "-q", "--top", "4", "--bank", "edges", "--jobs", jobs, "-o",
            ])
            .arg(&out)
            .arg(&inp)
            .assert()
            .success();
        std::fs::read(out.join("probe.csv")).unwrap()
    };
    assert_eq!(run("1"), run("3"));
    cargo_bin_cmd!("tapmap")
        .args(["probe", "--top", "0", "--bank", "edges", "-o"])
        .arg(t.path().join("x"))
        .arg(&inp)
        .assert()
        .code(2);
}
