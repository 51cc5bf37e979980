//! Checks against published values in `shared/reference/` (each entry there names
//! its source): convolution arithmetic, the Dumoulin & Visin numeric example,
//! numpy.pad's documented and recorded outputs, textbook kernel coefficients.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

use crate::common::{nums, reference, rows};
use ndarray::Array3;
use tapmap::border::{pad_1d, PadMode};
use tapmap::engine::{run_conv, ConvOptions, ConvStage, Engine};
use tapmap::geometry::{axis_geometry, Axis, Extent, PadWidth};
use tapmap::kernel::analysis::analyse_plane;
use tapmap::kernel::{Bank, FamilySpec, Kernel, Op};
use tapmap::stage::{Pool, PoolKind, PoolWindow};

fn one_kernel_bank(k: Kernel) -> Bank {
    Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "t".into(),
        op: Op::Correlate,
        description: None,
        kernels: vec![k],
    }
}

fn image(rows: &[Vec<f64>]) -> Array3<f32> {
    let (h, w) = (rows.len(), rows[0].len());
    Array3::from_shape_fn((1, h, w), |(_, y, x)| rows[y][x] as f32)
}

#[test]
fn output_sizes_match_dumoulin_visin() {
    let t = reference("published.json");
    for c in t["output_size"]["cases"].as_array().unwrap() {
        let g = |k: &str| c[k].as_u64().unwrap() as usize;
        let p = g("p");
        let ext = Extent::Explicit(PadWidth {
            top: p,
            bottom: p,
            left: p,
            right: p,
        });
        let geo = axis_geometry(Axis::Cols, g("i"), g("k"), g("s"), g("d"), ext).unwrap();
        assert_eq!(geo.output, g("o"), "case {c} ({})", c["where"]);
    }
}

#[test]
fn same_extent_gives_ceil_of_input_over_stride() {
    // PRODUCT definition of `same`: output = ceil(i / s), extra padding after.
    for i in 1..40 {
        for k in 1..8 {
            for s in 1..5 {
                for d in 1..3 {
                    let g = axis_geometry(Axis::Rows, i, k, s, d, Extent::Same).unwrap();
                    assert_eq!(g.output, i.div_ceil(s), "i={i} k={k} s={s} d={d}");
                    assert!(g.pad_after == g.pad_before || g.pad_after == g.pad_before + 1);
                }
            }
        }
    }
    // Full: k_eff − 1 each side (Dumoulin & Visin relationship 4 for d = 1).
    let g = axis_geometry(Axis::Rows, 5, 3, 1, 1, Extent::Full).unwrap();
    assert_eq!((g.pad_before, g.pad_after, g.output), (2, 2, 7));
}

#[test]
fn numeric_example_of_dumoulin_visin() {
    let t = &reference("published.json")["numeric_example"];
    let img = image(&rows(&t["input"]));
    let k = Kernel::from_rows("k", &rows(&t["kernel"])).unwrap();
    let bank = one_kernel_bank(k);
    let run = |pad: usize, stride: usize| {
        let options = ConvOptions {
            op: Some(Op::Correlate),
            pad: PadMode::Zero,
            extent: Extent::Explicit(PadWidth {
                top: pad,
                bottom: pad,
                left: pad,
                right: pad,
            }),
            stride: (stride, stride),
            dilation: (1, 1),
        };
        let stage = ConvStage {
            bank: bank.clone(),
            options,
        };
        [Engine::Reference, Engine::Direct].map(|e| run_conv(&stage, &img, e).unwrap())
    };
    for (pad, stride, key) in [(0, 1, "valid_stride1"), (1, 2, "pad1_stride2")] {
        let want = rows(&t[key]);
        for out in run(pad, stride) {
            let got: Vec<Vec<f64>> = out
                .outer_iter()
                .next()
                .unwrap()
                .rows()
                .into_iter()
                .map(|r| r.iter().map(|v| *v as f64).collect())
                .collect();
            assert_eq!(got, want, "{key}");
        }
    }
    let pool = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Sized {
            size: (3, 3),
            stride: (1, 1),
        },
    };
    let pooled = pool.apply(&img).unwrap();
    let got: Vec<Vec<f64>> = pooled
        .index_axis(ndarray::Axis(0), 0)
        .rows()
        .into_iter()
        .map(|r| r.iter().map(|v| *v as f64).collect())
        .collect();
    assert_eq!(got, rows(&t["maxpool3_stride1"]));
}

#[test]
fn numpy_pad_documented_examples() {
    let t = &reference("published.json")["numpy_pad_documented"];
    let a = nums(&t["input"]);
    let (b, e) = (
        t["before"].as_u64().unwrap() as usize,
        t["after"].as_u64().unwrap() as usize,
    );
    for (mode, want) in t["outputs"].as_object().unwrap() {
        let m: PadMode = mode.parse().unwrap();
        assert_eq!(pad_1d(&a, m, b, e), nums(want), "mode {mode}");
    }
}

#[test]
fn numpy_pad_recorded_wide_and_one_sample_cases() {
    let t = reference("numpy_pad_wide.json");
    let cases = t["cases"].as_array().unwrap();
    assert!(cases.len() >= 100);
    for c in cases {
        let m: PadMode = c["mode"].as_str().unwrap().parse().unwrap();
        let (b, e) = (
            c["before"].as_u64().unwrap() as usize,
            c["after"].as_u64().unwrap() as usize,
        );
        assert_eq!(
            pad_1d(&nums(&c["input"]), m, b, e),
            nums(&c["output"]),
            "{c}"
        );
    }
}

#[test]
fn textbook_kernels_and_their_factors() {
    let t = reference("published.json");
    for entry in t["kernels"].as_array().unwrap() {
        let fam = entry["family"].as_str().unwrap();
        let k = FamilySpec::parse(fam).unwrap().build(None).unwrap();
        assert_eq!(
            k.plane_rows(0),
            rows(&entry["taps"]),
            "{fam} ({})",
            entry["source"]
        );
        let a = analyse_plane(&k, 0);
        if let Some(col) = entry.get("column") {
            assert_eq!(a.rank, 1, "{fam}");
            let (u, v) = a.factors.clone().unwrap();
            assert_eq!((u, v), (nums(col), nums(&entry["row"])), "{fam}");
        }
        if let Some(s) = entry.get("sum") {
            assert_eq!(a.sum, s.as_f64().unwrap(), "{fam}");
        }
    }
}

#[test]
fn gaussian_sigma_one_five_taps() {
    let t = &reference("published.json")["gaussian_sigma1_5tap"];
    let want = nums(&t["taps"]);
    let tol = t["tolerance"].as_f64().unwrap();
    let k = FamilySpec::parse("gaussian:sigma=1,radius=2")
        .unwrap()
        .build(None)
        .unwrap();
    let (u, v) = analyse_plane(&k, 0).factors.unwrap();
    for (f, name) in [(u, "column"), (v, "row")] {
        for (g, w) in f.iter().zip(&want) {
            assert!((g - w).abs() <= tol, "{name} factor {f:?} vs {want:?}");
        }
    }
    // The 2-D taps are the outer product of the 1-D taps.
    for y in 0..5 {
        for x in 0..5 {
            assert!((k.tap(0, y, x) - want[y] * want[x]).abs() < 2.0 * tol);
        }
    }
}

#[test]
fn binomial_five_is_one_four_six_four_one_with_variance_one() {
    let t = &reference("published.json")["binomial_5"];
    let k = FamilySpec::parse("binomial:size=5")
        .unwrap()
        .build(None)
        .unwrap();
    let (_, v) = analyse_plane(&k, 0).factors.unwrap();
    assert_eq!(v, nums(&t["taps"]));
    let var: f64 = v
        .iter()
        .enumerate()
        .map(|(i, w)| w * (i as f64 - 2.0).powi(2))
        .sum();
    assert_eq!(var, t["variance"].as_f64().unwrap());
}

#[test]
fn luma_weights_are_bt709() {
    let t = &reference("published.json")["luma_bt709"];
    let w = nums(&t["weights"]);
    for (ours, theirs) in tapmap::image_io::BT709.iter().zip(&w) {
        assert_eq!(*ours as f64, (*theirs as f32) as f64);
    }
}

#[test]
fn statistics_equal_numpy_on_recorded_maps() {
    // shared/reference/numpy_stats.json, recorded by tools/numpy_stats_cases.py:
    // numpy.percentile's default method (linear, Hyndman & Fan 1996 definition
    // 7), min, max, mean and std (ddof 0) over the finite samples as float64.
    // The maps cover both paths of tapmap's statistics (the plain one for small
    // maps, the histogram one above 65,536 samples). Order statistics are exact;
    // the interpolated value may differ by rounding only, because numpy writes
    // the interpolation as b − (b − a)(1 − t) for t ≥ 0.5: a few ulps allowed.
    // Mean and std are f64 sums in another order: 1e-12 relative.
    let t = reference("numpy_stats.json");
    let cases = t["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 6);
    for c in cases {
        let int = |k: &str| c[k].as_i64().unwrap();
        let (n, a, b, m, off) = (int("n"), int("a"), int("b"), int("m"), int("c"));
        let d = c["d"].as_f64().unwrap();
        let mut v: Vec<f32> = (0..n)
            .map(|i| ((((i * a + b) % m) - off) as f64 / d) as f32)
            .collect();
        let (z, q) = (int("zero_every") as usize, int("nan_every") as usize);
        if z > 0 {
            v.iter_mut().step_by(z).for_each(|x| *x = 0.0);
        }
        if q > 0 {
            v.iter_mut().skip(1).step_by(q).for_each(|x| *x = f32::NAN);
        }
        let s = tapmap::stats::map_stats(&v, None);
        let name = c["name"].as_str().unwrap();
        assert_eq!(s.count as i64, int("count"), "{name}");
        assert_eq!(s.non_finite as i64, int("non_finite"), "{name}");
        let close = |got: Option<f64>, key: &str, rel: f64| {
            let want = c[key].as_f64().unwrap();
            let got = got.unwrap();
            let scale = want.abs().max(c["max"].as_f64().unwrap().abs()).max(1e-300);
            assert!(
                (got - want).abs() <= rel * scale,
                "{name} {key}: tapmap {got:e}, numpy {want:e}"
            );
        };
        for key in ["min", "max"] {
            let got = if key == "min" { s.min } else { s.max };
            assert_eq!(got.unwrap(), c[key].as_f64().unwrap(), "{name} {key}");
        }
        close(s.p1, "p01", 4.0 * f64::EPSILON);
        close(s.p50, "p50", 4.0 * f64::EPSILON);
        close(s.p99, "p99", 4.0 * f64::EPSILON);
        close(s.mean, "mean", 1e-12);
        close(s.std, "std", 1e-12);
        assert_eq!(
            s.zero_fraction,
            c["zero_fraction"].as_f64().unwrap(),
            "{name}"
        );
    }
}
