//! Identities of convolution that hold whatever the implementation, and the
//! activation and pool stages.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

use ndarray::Array3;
use tapmap::border::PadMode;
use tapmap::engine::{run_conv, ConvOptions, ConvStage, Engine};
use tapmap::geometry::Extent;
use tapmap::kernel::{Bank, FamilySpec, Kernel, Op};
use tapmap::pipeline::{run_recipe, Plan};
use tapmap::stage::{Activation, Pool, PoolKind, PoolWindow, Recipe, Stage};

fn stage(kernels: Vec<Kernel>, op: Op, pad: PadMode, extent: Extent) -> ConvStage {
    ConvStage {
        bank: Bank {
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
            name: "t".into(),
            op,
            description: None,
            kernels,
        },
        options: ConvOptions {
            op: None,
            pad,
            extent,
            stride: (1, 1),
            dilation: (1, 1),
        },
    }
}

fn family(spec: &str) -> Kernel {
    FamilySpec::parse(spec).unwrap().build(None).unwrap()
}

fn plane(a: &Array3<f32>) -> Vec<Vec<f32>> {
    a.index_axis(ndarray::Axis(0), 0)
        .rows()
        .into_iter()
        .map(|r| r.to_vec())
        .collect()
}

const ASYM: [[f64; 4]; 3] = [
    [1.0, 2.0, 3.0, 4.0],
    [5.0, 6.0, 7.0, 8.0],
    [9.0, 10.0, 11.0, 12.5],
];

#[test]
fn impulse_reproduces_the_kernel_under_convolve_and_its_rotation_under_correlate() {
    // Gonzalez & Woods, Digital Image Processing, 3rd ed., §3.4.2 (Fig. 3.30):
    // convolution with a unit impulse gives the kernel, correlation gives it rotated 180°.
    let rows: Vec<Vec<f64>> = ASYM.iter().map(|r| r.to_vec()).collect();
    let k = Kernel::from_rows("asym", &rows).unwrap();
    let mut img = Array3::<f32>::zeros((1, 1, 1));
    img[[0, 0, 0]] = 1.0;
    for engine in [Engine::Reference, Engine::Direct] {
        let conv = run_conv(
            &stage(vec![k.clone()], Op::Convolve, PadMode::Zero, Extent::Full),
            &img,
            engine,
        )
        .unwrap();
        let want: Vec<Vec<f32>> = ASYM
            .iter()
            .map(|r| r.iter().map(|v| *v as f32).collect())
            .collect();
        assert_eq!(plane(&conv), want);
        let corr = run_conv(
            &stage(vec![k.clone()], Op::Correlate, PadMode::Zero, Extent::Full),
            &img,
            engine,
        )
        .unwrap();
        let rotated: Vec<Vec<f32>> = want
            .iter()
            .rev()
            .map(|r| r.iter().rev().copied().collect())
            .collect();
        assert_eq!(plane(&corr), rotated);
    }
}

#[test]
fn full_zero_padded_convolution_is_commutative() {
    // (f * g) = (g * f) for true convolution over the full support
    // (Gonzalez & Woods 3rd ed., §4.2.4; common practice).
    let a: Vec<Vec<f64>> = (0..5)
        .map(|y| (0..4).map(|x| ((y * 4 + x) as f64 * 0.37).sin()).collect())
        .collect();
    let b: Vec<Vec<f64>> = ASYM
        .iter()
        .map(|r| r[..3].iter().map(|v| v / 10.0).collect())
        .collect();
    let as_img = |m: &Vec<Vec<f64>>| {
        Array3::from_shape_fn((1, m.len(), m[0].len()), |(_, y, x)| m[y][x] as f32)
    };
    let ab = run_conv(
        &stage(
            vec![Kernel::from_rows("b", &b).unwrap()],
            Op::Convolve,
            PadMode::Zero,
            Extent::Full,
        ),
        &as_img(&a),
        Engine::Direct,
    )
    .unwrap();
    let ba = run_conv(
        &stage(
            vec![Kernel::from_rows("a", &a).unwrap()],
            Op::Convolve,
            PadMode::Zero,
            Extent::Full,
        ),
        &as_img(&b),
        Engine::Direct,
    )
    .unwrap();
    assert_eq!(ab.dim(), (1, 7, 6));
    for (x, y) in ab.iter().zip(ba.iter()) {
        assert!((x - y).abs() < 1e-5, "{x} vs {y}");
    }
}

#[test]
fn sobel_on_a_ramp_and_a_step() {
    // Taps [1 2 1]ᵀ ⊗ [−1 0 1] (Szeliski 2010, §3.2.1): on I = a·x the response is
    // (1+2+1)·2a = 8a; on a unit step, 4 on both pixels beside the edge.
    let a = 0.25f32;
    let ramp = Array3::from_shape_fn((1, 6, 9), |(_, _, x)| a * x as f32);
    let out = run_conv(
        &stage(
            vec![family("sobel-x")],
            Op::Correlate,
            PadMode::Replicate,
            Extent::Same,
        ),
        &ramp,
        Engine::Auto,
    )
    .unwrap();
    for y in 0..6 {
        for x in 1..8 {
            assert_eq!(out[[0, y, x]], 8.0 * a, "({y},{x})");
        }
        // Replicate padding makes the derivative across the border half as large.
        assert_eq!(out[[0, y, 0]], 4.0 * a);
    }
    let step = Array3::from_shape_fn((1, 5, 8), |(_, _, x)| if x >= 4 { 1.0f32 } else { 0.0 });
    let out = run_conv(
        &stage(
            vec![family("sobel-x")],
            Op::Correlate,
            PadMode::Replicate,
            Extent::Same,
        ),
        &step,
        Engine::Auto,
    )
    .unwrap();
    for y in 0..5 {
        let row: Vec<f32> = (0..8).map(|x| out[[0, y, x]]).collect();
        assert_eq!(row, vec![0.0, 0.0, 0.0, 4.0, 4.0, 0.0, 0.0, 0.0]);
    }
    // Under convolve the same taps flip sign on the ramp.
    let out = run_conv(
        &stage(
            vec![family("sobel-x")],
            Op::Convolve,
            PadMode::Replicate,
            Extent::Same,
        ),
        &ramp,
        Engine::Auto,
    )
    .unwrap();
    assert_eq!(out[[0, 2, 4]], -8.0 * a);
}

#[test]
fn gaussians_compose_by_adding_variances() {
    // G(σ1) * G(σ2) = G(√(σ1² + σ2²)) (Szeliski 2010, §3.5.2; the sampled kernels
    // agree closely for σ ≥ 1). Compared away from the borders.
    let (h, w) = (72, 64);
    let img = Array3::from_shape_fn((1, h, w), |(_, y, x)| {
        ((x * 31 + y * 17) % 23) as f32 / 23.0
    });
    let g = |s: f64| family(&format!("gaussian:sigma={s},radius={}", (5.0 * s).ceil()));
    let run = |k: Kernel, i: &Array3<f32>| {
        run_conv(
            &stage(vec![k], Op::Convolve, PadMode::Zero, Extent::Same),
            i,
            Engine::Direct,
        )
        .unwrap()
    };
    let two = run(g(1.6), &run(g(1.2), &img));
    let one = run(g(2.0), &img);
    let m = 20;
    let worst = (m..h - m)
        .flat_map(|y| (m..w - m).map(move |x| (y, x)))
        .map(|(y, x)| (two[[0, y, x]] - one[[0, y, x]]).abs())
        .fold(0.0f32, f32::max);
    assert!(worst < 2e-4, "worst {worst}");
}

#[test]
fn constant_image_under_normalised_kernels_and_zero_corners() {
    // A 3×3 box on a constant image: every mode but zero keeps the constant; zero
    // gives 4/9 at a corner and 6/9 along an edge (from the definition).
    let img = Array3::from_elem((1, 5, 6), 1.0f32);
    for mode in PadMode::ALL {
        let out = run_conv(
            &stage(vec![family("box:size=3")], Op::Convolve, mode, Extent::Same),
            &img,
            Engine::Direct,
        )
        .unwrap();
        if mode == PadMode::Zero {
            assert!((out[[0, 0, 0]] - 4.0 / 9.0).abs() < 1e-6);
            assert!((out[[0, 0, 3]] - 6.0 / 9.0).abs() < 1e-6);
            assert!((out[[0, 2, 3]] - 1.0).abs() < 1e-6);
        } else {
            assert!(out.iter().all(|v| (v - 1.0).abs() < 1e-6), "{mode}");
        }
    }
}

#[test]
fn activations() {
    let mut v = [-2.0f32, -0.5, 0.0, 1.5];
    Activation::Relu.apply(&mut v);
    assert_eq!(v, [0.0, 0.0, 0.0, 1.5]);
    let mut v = [-2.0f32, 3.0];
    "leaky-relu:0.1"
        .parse::<Activation>()
        .unwrap()
        .apply(&mut v);
    assert_eq!(v, [-0.2, 3.0]);
    let mut v = [-2.0f32, 3.0];
    Activation::Abs.apply(&mut v);
    assert_eq!(v, [2.0, 3.0]);
    let mut v = [-2.0f32, 3.0];
    Activation::Square.apply(&mut v);
    assert_eq!(v, [4.0, 9.0]);
    let mut v = [0.0f32, 1.0];
    Activation::Sigmoid.apply(&mut v);
    assert!((v[0] - 0.5).abs() < 1e-7 && (v[1] - 0.731_058_6).abs() < 1e-6);
    let mut v = [0.5f32];
    Activation::Tanh.apply(&mut v);
    assert!((v[0] - 0.462_117_16).abs() < 1e-6);
    assert!("leaky-relu:x".parse::<Activation>().is_err());
    assert!("relu:2".parse::<Activation>().is_err());
    assert!("gelu".parse::<Activation>().is_err());
}

#[test]
fn pools() {
    let img = Array3::from_shape_fn((2, 4, 5), |(c, y, x)| (c * 100 + y * 5 + x) as f32);
    let mean = Pool {
        kind: PoolKind::Mean,
        window: PoolWindow::Sized {
            size: (2, 2),
            stride: (2, 2),
        },
    };
    let out = mean.apply(&img).unwrap();
    // o = floor((5 − 2)/2) + 1 = 2 columns (Dumoulin & Visin 2016, relationship 7).
    assert_eq!(out.dim(), (2, 2, 2));
    assert_eq!(out[[0, 0, 0]], (0.0 + 1.0 + 5.0 + 6.0) / 4.0);
    assert_eq!(
        out[[1, 1, 1]],
        (100.0 + 12.0 + 13.0 + 17.0 + 18.0 + 300.0) / 4.0
    );
    let global = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Global,
    };
    let g = global.apply(&img).unwrap();
    assert_eq!(g.dim(), (2, 1, 1));
    assert_eq!((g[[0, 0, 0]], g[[1, 0, 0]]), (19.0, 119.0));
    let gm = Pool {
        kind: PoolKind::Mean,
        window: PoolWindow::Global,
    }
    .apply(&img)
    .unwrap();
    assert!((gm[[0, 0, 0]] - 9.5).abs() < 1e-6);
    let too_big = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Sized {
            size: (5, 5),
            stride: (1, 1),
        },
    };
    let e = too_big.apply(&img).unwrap_err().to_string();
    assert!(
        e.contains("window height 5 is larger than its input height 4"),
        "{e}"
    );
    let mut nan = img.clone();
    nan[[0, 1, 1]] = f32::NAN;
    let out = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Sized {
            size: (2, 2),
            stride: (2, 2),
        },
    }
    .apply(&nan)
    .unwrap();
    assert!(out[[0, 0, 0]].is_nan() && !out[[0, 0, 1]].is_nan());
}

#[test]
fn recipe_runs_stages_in_order_and_plans_sizes() {
    let conv = stage(
        vec![family("sobel-x"), family("sobel-y")],
        Op::Correlate,
        PadMode::Reflect,
        Extent::Valid,
    );
    let recipe = Recipe {
        stages: vec![
            Stage::Conv(conv.clone()),
            Stage::Act(Activation::Abs),
            Stage::Pool(Pool {
                kind: PoolKind::Max,
                window: PoolWindow::Sized {
                    size: (2, 2),
                    stride: (2, 2),
                },
            }),
        ],
    };
    let img = Array3::from_shape_fn((1, 11, 10), |(_, y, x)| ((x * x + 3 * y) % 7) as f32);
    let out = run_recipe(&recipe, img.view(), Engine::Auto).unwrap();
    let mut by_hand = run_conv(&conv, &img, Engine::Reference).unwrap();
    by_hand.mapv_inplace(f32::abs);
    let by_hand = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Sized {
            size: (2, 2),
            stride: (2, 2),
        },
    }
    .apply(&by_hand)
    .unwrap();
    assert_eq!(out, by_hand);
    let plan = Plan::new(&recipe, (1, 11, 10), Engine::Auto).unwrap();
    let plan = plan.sizes();
    assert_eq!(plan[0].output, (2, 9, 8));
    assert_eq!(plan[2].output, (2, 4, 4));
    // 9 rows pooled by 2 leave one row unused; receptive field 3 + (2 − 1)·1 = 4.
    assert_eq!(plan[2].unused, (1, 0));
    assert_eq!((plan[2].field.0.size, plan[2].field.0.jump), (4, 2));
    assert_eq!(plan[0].operations, 2 * 9 * 8 * 9);
    assert_eq!(recipe.channel_names(1), vec!["sobel-x", "sobel-y"]);
}

#[test]
fn stride_leaves_input_unused_at_the_far_edge() {
    // i = 10, k = 3, s = 4, valid: windows start at 0 and 4 (o = 2) and cover 0..7,
    // leaving rows 7, 8, 9 unused.
    let g =
        tapmap::geometry::axis_geometry(tapmap::geometry::Axis::Rows, 10, 3, 4, 1, Extent::Valid)
            .unwrap();
    assert_eq!((g.output, g.unused_input()), (2, 3));
    let e =
        tapmap::geometry::axis_geometry(tapmap::geometry::Axis::Rows, 10, 3, 0, 1, Extent::Valid)
            .unwrap_err();
    assert!(e.to_string().contains("stride along the height is 0"));
    let e =
        tapmap::geometry::axis_geometry(tapmap::geometry::Axis::Cols, 4, 3, 1, 2, Extent::Valid)
            .unwrap_err();
    assert!(e.to_string().contains("kernel width 5 (a 3-tap kernel with dilation 2) is larger than the padded input width 4"), "{e}");
}
