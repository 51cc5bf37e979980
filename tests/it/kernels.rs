//! Kernel families, analysis and bank files.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

use std::path::Path;

use tapmap::kernel::analysis::{analyse_plane, numeric_rank, Parity};
use tapmap::kernel::bankfile::{bank_to_toml, parse_bank};
use tapmap::kernel::builtin::{resolve_bank, SHIPPED_BANKS};
use tapmap::kernel::families::FAMILIES;
use tapmap::kernel::{Bank, FamilySpec, Kernel, Op};

fn build(spec: &str) -> Kernel {
    FamilySpec::parse(spec).unwrap().build(None).unwrap()
}

fn sum(k: &Kernel) -> f64 {
    k.planes[0].iter().sum()
}

/// Variance along x of a kernel whose taps are a distribution (sum 1).
fn variance_x(k: &Kernel) -> f64 {
    let c = (k.cols / 2) as f64;
    (0..k.rows)
        .flat_map(|y| (0..k.cols).map(move |x| (y, x)))
        .map(|(y, x)| k.tap(0, y, x) * (x as f64 - c).powi(2))
        .sum()
}

#[test]
fn every_family_builds_with_its_defaults() {
    for f in FAMILIES {
        let k = build(f.name);
        k.validate().unwrap();
        assert!(!f.source.is_empty());
        assert_eq!(k.origin.as_ref().unwrap().family, f.name);
    }
}

#[test]
fn smoothing_kernels_sum_to_one() {
    for spec in [
        "box",
        "box:size=4",
        "binomial",
        "binomial:size=7",
        "gaussian",
        "gaussian:sigma=0.5",
        "gaussian:sigma=3.7",
        "gaussian:sigma=2,radius=1",
    ] {
        assert!((sum(&build(spec)) - 1.0).abs() < 1e-12, "{spec}");
    }
}

#[test]
fn gaussian_radius_rule_and_variance() {
    // Radius rule: ceil(3σ) (stated in the family's docs).
    assert_eq!(build("gaussian:sigma=1").rows, 7);
    assert_eq!(build("gaussian:sigma=1.2").rows, 2 * 4 + 1);
    assert_eq!(build("gaussian:sigma=2,radius=4").cols, 9);
    // Variance ≈ σ² when the radius is wide (sampled Gaussian; common practice, no source).
    for sigma in [1.0f64, 1.5, 2.5] {
        let k = build(&format!(
            "gaussian:sigma={sigma},radius={}",
            (6.0 * sigma).ceil()
        ));
        assert!(
            (variance_x(&k) - sigma * sigma).abs() < 1e-6,
            "sigma {sigma}: {}",
            variance_x(&k)
        );
    }
}

#[test]
fn band_pass_kernels_sum_to_zero() {
    for spec in [
        "laplace-4",
        "laplace-8",
        "log",
        "log:sigma=2.3",
        "dog",
        "dog:sigma=1.5,ratio=2",
        "sobel-x",
        "scharr-y",
        "prewitt-x",
    ] {
        assert!(
            sum(&build(spec)).abs() < 1e-12,
            "{spec}: {}",
            sum(&build(spec))
        );
    }
    // LoG in the Gonzalez & Woods form has a negative centre.
    let k = build("log:sigma=1.4");
    assert!(k.tap(0, k.rows / 2, k.cols / 2) < 0.0);
}

#[test]
fn gabor_orientation_and_phase() {
    let g0 = build("gabor:theta=0,aspect=1");
    let g90 = build("gabor:theta=90,aspect=1");
    // θ = 90° turns x' into y: the kernel is the transpose of θ = 0.
    for y in 0..g0.rows {
        for x in 0..g0.cols {
            assert!((g90.tap(0, y, x) - g0.tap(0, x, y)).abs() < 1e-12);
        }
    }
    let a = analyse_plane(&build("gabor:phase=90"), 0);
    assert_eq!(a.symmetry.mirror_x, Parity::Odd, "odd phase is odd along x");
    assert_eq!(a.symmetry.mirror_y, Parity::Even);
    let e = analyse_plane(&build("gabor"), 0);
    assert_eq!(e.symmetry.rot180, Parity::Even);
}

#[test]
fn ranks_and_factors() {
    assert_eq!(analyse_plane(&build("laplace-4"), 0).rank, 2);
    assert_eq!(analyse_plane(&build("laplace-8"), 0).rank, 2);
    assert_eq!(analyse_plane(&build("log"), 0).factors, None);
    for spec in [
        "gaussian:sigma=1.7",
        "box:size=5",
        "binomial:size=4",
        "sobel-y",
        "scharr-x",
        "identity:size=3",
    ] {
        let k = build(spec);
        let a = analyse_plane(&k, 0);
        assert_eq!(a.rank, 1, "{spec}");
        // A separable kernel equals the outer product of its factors (Szeliski 2010, §3.2.1).
        let (u, v) = a.factors.unwrap();
        for y in 0..k.rows {
            for x in 0..k.cols {
                assert!((u[y] * v[x] - k.tap(0, y, x)).abs() < 1e-12, "{spec}");
            }
        }
    }
    // Random outer products are rank 1; sums of two are rank 2.
    let u = [0.3, -1.2, 2.0, 0.7];
    let v = [1.5, 0.0, -0.25];
    let p: Vec<f64> = u
        .iter()
        .flat_map(|a| v.iter().map(move |b| a * b))
        .collect();
    assert_eq!(numeric_rank(&p, 4, 3, 1e-12), 1);
    let (a, b) = ([1.0, 0.0, 0.5, -2.0], [0.2, 0.9, 0.4]);
    let q: Vec<f64> = p
        .iter()
        .enumerate()
        .map(|(i, x)| x + a[i / 3] * b[i % 3])
        .collect();
    assert_eq!(numeric_rank(&q, 4, 3, 1e-12), 2);
}

#[test]
fn symmetry_report() {
    let a = analyse_plane(&build("sobel-x"), 0);
    assert_eq!(
        (a.symmetry.mirror_x, a.symmetry.mirror_y, a.symmetry.rot180),
        (Parity::Odd, Parity::Even, Parity::Odd)
    );
    let g = analyse_plane(&build("gaussian"), 0);
    assert_eq!(
        (g.symmetry.rot180, g.symmetry.transpose),
        (Parity::Even, Parity::Even)
    );
    assert!((g.sum - 1.0).abs() < 1e-12);
    assert!((analyse_plane(&build("sobel-x"), 0).l1 - 8.0).abs() < 1e-12);
}

#[test]
fn bank_files_round_trip_exactly() {
    let mut banks: Vec<Bank> = SHIPPED_BANKS
        .iter()
        .map(|(n, _)| resolve_bank(n).unwrap())
        .collect();
    let awkward = vec![
        // Values f64 holds exactly that text must too; 5e37 stays within float32.
        vec![0.1, 1.0 / 3.0, -2.5e-300, 5e37],
        vec![f64::MIN_POSITIVE, -0.0, 7.0, std::f64::consts::PI],
    ];
    let mut k1 = Kernel::from_rows("awkward", &awkward).unwrap();
    k1.scale = 0.123456789012345;
    k1.bias = -1e-17;
    let mut k2 = Kernel::from_rows("rgb", &awkward).unwrap();
    k2.planes = vec![
        k2.planes[0].clone(),
        k2.planes[0].iter().map(|v| v * 3.0).collect(),
        vec![0.5; 8],
    ];
    banks.push(Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "odd values".into(),
        op: Op::Convolve,
        description: Some("quotes \" and \n newlines".into()),
        kernels: vec![k1],
    });
    banks.push(Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "three planes".into(),
        op: Op::Correlate,
        description: None,
        kernels: vec![k2],
    });
    for bank in banks {
        let text = bank_to_toml(&bank).unwrap();
        let back = parse_bank(&text, Path::new("mem.toml")).unwrap();
        assert_eq!(back, bank, "{text}");
        // Bit-exact taps, including the sign of zero.
        for (a, b) in back.kernels.iter().zip(&bank.kernels) {
            for (pa, pb) in a.planes.iter().zip(&b.planes) {
                assert!(pa.iter().zip(pb).all(|(x, y)| x.to_bits() == y.to_bits()));
            }
        }
        assert_eq!(bank_to_toml(&back).unwrap(), text);
    }
}

fn bank_error(text: &str) -> String {
    parse_bank(text, Path::new("bad.toml"))
        .unwrap_err()
        .to_string()
}

#[test]
fn bad_bank_files_name_the_file_and_place() {
    let cases: &[(&str, &[&str])] = &[
        ("[[kernel]]\nname = \"a\"\ntaps = [[1, 2], [3]]\n", &["bad.toml", "line 3", "ragged", "row 1"]),
        ("[[kernel]]\nname = \"a\"\ntaps = []\n", &["bad.toml", "line 3", "empty"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1, nan]]\n", &["bad.toml", "line 3", "non-finite", "NaN"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[inf]]\n", &["bad.toml", "non-finite", "inf"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1]]\nwieght = 2\n", &["bad.toml", "line 4", "wieght"]),
        ("nmae = \"x\"\n[[kernel]]\ntaps = [[1]]\n", &["bad.toml", "line 1", "nmae"]),
        ("[[kernel]]\nname = \"a\"\ntaps = \"sobel\"\n", &["bad.toml", "line 3", "column 8"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1, \"x\"]]\n", &["bad.toml", "line 3"]),
        ("name = \"empty\"\n", &["bad.toml", "no [[kernel]]"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1]]\n[[kernel]]\nname = \"a\"\ntaps = [[2]]\n", &["two kernels named 'a'"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1]]\nbias = nan\n", &["line 4", "bias must be finite"]),
        ("[[kernel]]\nname = \"a\"\nfamily = \"gausian\"\n", &["line 1", "unknown kernel family 'gausian'", "gaussian"]),
        ("[[kernel]]\nname = \"a\"\nfamily = \"gaussian\"\nparams = { sigma = -1 }\n", &["sigma must be a positive number"]),
        ("[[kernel]]\nname = \"a\"\nfamily = \"box\"\nparams = { size = 3, sigma = 1 }\n", &["no parameter 'sigma'"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1]]\nfamily = \"box\"\n", &["exactly one of taps, planes or family"]),
        ("[[kernel]]\nname = \"a\"\nplanes = [[[1, 2]], [[1, 2, 3]]]\n", &["plane 1 is 1×3 but plane 0 is 1×2"]),
        ("[[kernel]]\nname = \"a\"\ntaps = [[1]]\n[[kernel]]\nname = \"b\"\nplanes = [[[1]], [[1]]]\n", &["2 planes", "all kernels of a bank"]),
        ("op = \"rotate\"\n[[kernel]]\ntaps = [[1]]\n", &["line 1", "rotate"]),
    ];
    for (text, needles) in cases {
        let msg = bank_error(text);
        for n in *needles {
            assert!(
                msg.contains(n),
                "message for\n{text}\nwas: {msg}\n(missing '{n}')"
            );
        }
    }
}

#[test]
fn unknown_bank_names_list_near_names() {
    let e = resolve_bank("sobelx").unwrap_err().to_string();
    assert!(e.contains("sobel-x") && e.contains("bank list"), "{e}");
    let e = resolve_bank("edgse").unwrap_err().to_string();
    assert!(e.contains("edges"), "{e}");
    let e = resolve_bank("missing-file.toml").unwrap_err().to_string();
    assert!(e.contains("missing-file.toml"), "{e}");
}

#[test]
fn family_specs_join_with_plus() {
    let b = resolve_bank("sobel-x+gaussian:sigma=1.5,radius=2").unwrap();
    assert_eq!(b.kernels.len(), 2);
    assert_eq!(b.kernels[1].name, "gaussian:sigma=1.5,radius=2");
    assert_eq!(b.kernels[1].rows, 5);
    assert_eq!(b.op, Op::Correlate);
    assert!(resolve_bank("box:size=2.5").is_err());
    assert!(resolve_bank("identity:size=2").is_err());
}
