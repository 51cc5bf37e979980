//! Every strategy against the independent oracle in `tests/common` (f64, explicit
//! padding, literal sums): random cases from a fixed seed, and a deliberate grid
//! of every small image size against every small kernel size, for every pad mode,
//! both ops and several strides and dilations.
//!
//! Tolerance: f32 accumulation of n terms errs by at most about n·ε·Σ|terms|
//! (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., §3.1);
//! we allow that bound, plus ε·|bias|.

#![allow(clippy::needless_range_loop)] // index loops read like the formulas they check

use crate::common::{oracle, worst, OracleConv, OracleKernel};
use ndarray::Array3;
use proptest::prelude::*;
use proptest::test_runner::{Config, RngSeed};
use tapmap::border::PadMode;
use tapmap::engine::{run_conv, ConvOptions, ConvStage, Engine};
use tapmap::geometry::{Extent, PadWidth};
use tapmap::kernel::{Bank, Kernel, Op};

const ENGINES: [Engine; 5] = [
    Engine::Reference,
    Engine::Direct,
    Engine::Separable,
    Engine::Matmul,
    Engine::Fft,
];

#[derive(Clone, Debug)]
struct Case {
    channels: usize,
    h: usize,
    w: usize,
    input: Vec<f64>,
    kernels: Vec<OracleKernel>,
    mode: PadMode,
    extent: Extent,
    stride: (usize, usize),
    dilation: (usize, usize),
    op: Op,
}

fn stage_of(case: &Case) -> ConvStage {
    let kernels = case
        .kernels
        .iter()
        .enumerate()
        .map(|(i, k)| Kernel {
            name: format!("k{i}"),
            rows: k.rows,
            cols: k.cols,
            planes: k.planes.clone(),
            scale: k.scale,
            bias: k.bias,
            origin: None,
            angle: None,
        })
        .collect();
    ConvStage {
        bank: Bank {
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
            name: "case".into(),
            op: Op::Correlate,
            description: None,
            kernels,
        },
        options: ConvOptions {
            op: Some(case.op),
            pad: case.mode,
            extent: case.extent,
            stride: case.stride,
            dilation: case.dilation,
        },
    }
}

/// Runs every engine and compares with the oracle; returns Err with the worst
/// pixel on failure. Impossible geometry must fail in tapmap exactly when the
/// dilated kernel does not fit in the padded input.
fn check(case: &Case) -> Result<(), String> {
    let stage = stage_of(case);
    let input = Array3::from_shape_vec(
        (case.channels, case.h, case.w),
        case.input.iter().map(|v| *v as f32).collect(),
    )
    .unwrap();
    let prepared = stage.output_shape(case.channels, case.h, case.w);
    let max_x = case.input.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    for (n, k) in case.kernels.iter().enumerate() {
        let eh = case.dilation.0 * (k.rows - 1) + 1;
        let ew = case.dilation.1 * (k.cols - 1) + 1;
        let pads = match case.extent {
            Extent::Valid => [0, 0, 0, 0],
            Extent::Full => [eh - 1, eh - 1, ew - 1, ew - 1],
            Extent::Explicit(p) => [p.top, p.bottom, p.left, p.right],
            Extent::Same => {
                let g = stage
                    .kernel_geometry(n, case.h, case.w)
                    .map_err(|e| e.to_string())?;
                [
                    g.rows.pad_before,
                    g.rows.pad_after,
                    g.cols.pad_before,
                    g.cols.pad_after,
                ]
            }
        };
        let fits = eh <= case.h + pads[0] + pads[1] && ew <= case.w + pads[2] + pads[3];
        if !fits {
            return match &prepared {
                Err(_) => Ok(()),
                Ok(_) => Err(format!(
                    "kernel {n} does not fit but prepare accepted {case:?}"
                )),
            };
        }
    }
    let (_, out_height, out_width) =
        prepared.map_err(|e| format!("prepare refused a valid case: {e}; {case:?}"))?;
    for engine in ENGINES {
        let out = run_conv(&stage, &input, engine).map_err(|e| e.to_string())?;
        let (oc, oh, ow) = out.dim();
        if oc != case.kernels.len() || (oh, ow) != (out_height, out_width) {
            return Err(format!("{engine}: shape {:?}", out.dim()));
        }
        for (n, k) in case.kernels.iter().enumerate() {
            let g = stage.kernel_geometry(n, case.h, case.w).unwrap();
            let conv = OracleConv {
                mode: case.mode,
                pads: [
                    g.rows.pad_before,
                    g.rows.pad_after,
                    g.cols.pad_before,
                    g.cols.pad_after,
                ],
                stride: case.stride,
                dilation: case.dilation,
                convolve: case.op == Op::Convolve,
            };
            let (want, wh, ww) = oracle(&case.input, case.channels, case.h, case.w, k, conv);
            if (wh, ww) != (oh, ow) {
                return Err(format!(
                    "{engine}: kernel {n}: size {oh}×{ow}, oracle {wh}×{ww}; {case:?}"
                ));
            }
            let got: Vec<f32> = out
                .index_axis(ndarray::Axis(0), n)
                .iter()
                .copied()
                .collect();
            let terms = (case.channels * k.rows * k.cols) as f64;
            let l1: f64 = k.planes.iter().flatten().map(|t| t.abs()).sum();
            let tol =
                (terms + 2.0) * f32::EPSILON as f64 * (l1 * max_x * k.scale.abs() + k.bias.abs())
                    + 1e-30;
            let (d, at) = worst(&got, &want);
            if d.is_nan() || d > tol {
                return Err(format!(
                    "{engine}: kernel {n}: worst pixel (y {}, x {}) differs by {d:e} (tol {tol:e}): got {}, want {}; {case:?}",
                    at / ow,
                    at % ow,
                    got[at],
                    want[at]
                ));
            }
        }
    }
    Ok(())
}

fn mode_strategy() -> impl Strategy<Value = PadMode> {
    prop::sample::select(PadMode::ALL.to_vec())
}

fn extent_strategy() -> impl Strategy<Value = Extent> {
    prop_oneof![
        Just(Extent::Valid),
        Just(Extent::Same),
        Just(Extent::Full),
        (0usize..12, 0usize..12, 0usize..12, 0usize..12).prop_map(|(t, b, l, r)| Extent::Explicit(
            PadWidth {
                top: t,
                bottom: b,
                left: l,
                right: r
            }
        )),
    ]
}

fn case_strategy() -> impl Strategy<Value = Case> {
    (
        1usize..3,
        1usize..14,
        1usize..14,
        1usize..4,
        1usize..6,
        1usize..6,
    )
        .prop_flat_map(|(channels, h, w, nk, kh, kw)| {
            let input = prop::collection::vec(-4.0f64..4.0, channels * h * w);
            let kernel = (
                prop::collection::vec(prop::collection::vec(-2.0f64..2.0, kh * kw), channels),
                prop_oneof![Just(1.0f64), 0.1f64..3.0],
                prop_oneof![Just(0.0f64), -1.0f64..1.0],
            )
                .prop_map(move |(planes, scale, bias)| OracleKernel {
                    rows: kh,
                    cols: kw,
                    planes,
                    scale,
                    bias,
                });
            (
                Just((channels, h, w)),
                input,
                prop::collection::vec(kernel, nk),
                mode_strategy(),
                extent_strategy(),
                (1usize..4, 1usize..4),
                (1usize..3, 1usize..3),
                prop_oneof![Just(Op::Correlate), Just(Op::Convolve)],
            )
        })
        .prop_map(
            |((channels, h, w), input, kernels, mode, extent, stride, dilation, op)| Case {
                channels,
                h,
                w,
                input,
                kernels,
                mode,
                extent,
                stride,
                dilation,
                op,
            },
        )
}

proptest! {
    #![proptest_config(Config { cases: 600, rng_seed: RngSeed::Fixed(0x7A9_3A9), failure_persistence: None, ..Config::default() })]
    #[test]
    fn strategies_equal_the_oracle_on_random_cases(case in case_strategy()) {
        check(&case).map_err(TestCaseError::fail)?;
    }
}

/// Cases whose kernels are rank 1 in every plane (outer products, some planes
/// zero), so that the separable strategy really runs.
fn separable_case_strategy() -> impl Strategy<Value = Case> {
    (
        case_strategy(),
        prop::collection::vec(
            (
                prop::collection::vec(-2.0f64..2.0, 1..7),
                prop::collection::vec(-2.0f64..2.0, 1..7),
                0u8..6,
            ),
            1..4,
        ),
    )
        .prop_map(|(mut case, factors)| {
            let (kh, kw) = (factors[0].0.len(), factors[0].1.len());
            case.kernels = factors
                .iter()
                .map(|(u, v, zero)| OracleKernel {
                    rows: kh,
                    cols: kw,
                    planes: (0..case.channels)
                        .map(|c| {
                            (0..kh)
                                .flat_map(|y| (0..kw).map(move |x| (y, x)))
                                .map(|(y, x)| {
                                    if *zero as usize == c + 1 {
                                        0.0
                                    } else {
                                        u[y % u.len()] * v[x % v.len()] * (c + 1) as f64
                                    }
                                })
                                .collect()
                        })
                        .collect(),
                    scale: 1.0,
                    bias: 0.25,
                })
                .collect();
            case
        })
}

proptest! {
    #![proptest_config(Config { cases: 300, rng_seed: RngSeed::Fixed(0x5E9A), failure_persistence: None, ..Config::default() })]
    #[test]
    fn separable_strategy_equals_the_oracle_on_rank_one_kernels(case in separable_case_strategy()) {
        check(&case).map_err(TestCaseError::fail)?;
    }
}

#[test]
fn the_planner_chooses_by_the_bank_not_by_the_result() {
    use tapmap::engine::choose_for;
    use tapmap::kernel::builtin::resolve_bank;
    let plan = |bank: &str| {
        let stage = ConvStage {
            bank: resolve_bank(bank).unwrap(),
            options: ConvOptions::default(),
        };
        choose_for(&stage, (1, 64, 64), Engine::Auto)
            .unwrap()
            .engine
    };
    assert_eq!(plan("gaussian:sigma=2"), Engine::Separable);
    assert_eq!(
        plan("smooth"),
        Engine::Direct,
        "box 3×3 is rank 1 but below the threshold"
    );
    assert_eq!(
        plan("binomial:size=9+gaussian:sigma=1.5"),
        Engine::Separable
    );
    assert_eq!(
        plan("binomial:size=5"),
        Engine::Separable,
        "5×5 is at the measured crossover"
    );
    assert_eq!(plan("binomial:size=3"), Engine::Direct, "3×3 is below it");
    assert_eq!(plan("edges"), Engine::Direct, "laplace-8 is rank 2");
    assert_eq!(
        plan("sobel-x+sobel-y+scharr-x+scharr-y+prewitt-x+prewitt-y+laplace-4+laplace-8"),
        Engine::Direct,
        "an 8-kernel 3×3 bank"
    );
    assert_eq!(
        plan("log:sigma=1"),
        Engine::Direct,
        "LoG is not rank 1; 7×7"
    );
    assert_eq!(
        plan("log:sigma=2"),
        Engine::Fft,
        "13×13 = 169 taps, not rank 1: at the measured FFT crossover"
    );
    assert_eq!(
        plan("gaussian:sigma=5"),
        Engine::Separable,
        "large but rank 1: two 1-D passes beat any transform"
    );
    // Learned banks: many kernels over several channels go to the matrix product.
    let learned = |n: usize, c: usize, k: usize| {
        let kernels = (0..n)
            .map(|i| Kernel {
                name: format!("f{i}"),
                rows: k,
                cols: k,
                planes: (0..c).map(|j| ramp(k * k, i + j)).collect(),
                scale: 1.0,
                bias: 0.0,
                origin: None,
                angle: None,
            })
            .collect();
        let stage = ConvStage {
            bank: Bank {
                normalize: None,
                contrast: None,
                provenance: None,
                pad: None,
                name: "l".into(),
                op: Op::Correlate,
                description: None,
                kernels,
            },
            options: ConvOptions {
                extent: Extent::Explicit(PadWidth {
                    top: 3,
                    bottom: 3,
                    left: 3,
                    right: 3,
                }),
                stride: (2, 2),
                ..ConvOptions::default()
            },
        };
        choose_for(&stage, (c, 64, 64), Engine::Auto)
            .unwrap()
            .engine
    };
    assert_eq!(learned(64, 3, 7), Engine::Matmul, "a 64×3×7×7 bank");
    assert_eq!(
        learned(8, 1, 31),
        Engine::Fft,
        "31×31 at stride 2: 240 taps per output"
    );
    assert_eq!(
        learned(8, 1, 15),
        Engine::Matmul,
        "15×15 at stride 2: 56 taps per output"
    );
    assert_eq!(learned(8, 1, 3), Engine::Direct, "an 8-kernel 3×3 bank");
    let mixed = ConvStage {
        bank: resolve_bank("smooth").unwrap(),
        options: ConvOptions::default(),
    };
    let c = choose_for(&mixed, (1, 32, 32), Engine::Matmul).unwrap();
    assert_eq!(
        c.engine,
        Engine::Direct,
        "kernels of several sizes cannot share one product"
    );
    let stage = ConvStage {
        bank: resolve_bank("log").unwrap(),
        options: ConvOptions::default(),
    };
    let c = choose_for(&stage, (1, 16, 16), Engine::Separable).unwrap();
    assert_eq!(c.engine, Engine::Direct);
    assert!(c.reason.contains("not rank 1"));
}

/// Deterministic small values so that the grid needs no RNG.
fn ramp(n: usize, seed: usize) -> Vec<f64> {
    (0..n)
        .map(|i| (((i * 7 + seed * 13) % 17) as f64 - 8.0) / 4.0)
        .collect()
}

#[test]
fn grid_of_small_images_and_kernels() {
    let mut checked = 0;
    for h in 1..=6 {
        for w in 1..=6 {
            for kh in 1..=4 {
                for kw in 1..=4 {
                    for mode in PadMode::ALL {
                        for (extent, stride, dilation, op) in [
                            (Extent::Full, (1, 1), (1, 1), Op::Convolve),
                            (Extent::Same, (2, 1), (1, 2), Op::Correlate),
                            (Extent::Valid, (1, 2), (1, 1), Op::Convolve),
                            (
                                Extent::Explicit(PadWidth {
                                    top: 7,
                                    bottom: 0,
                                    left: 1,
                                    right: 9,
                                }),
                                (3, 1),
                                (2, 1),
                                Op::Correlate,
                            ),
                        ] {
                            let k = OracleKernel {
                                rows: kh,
                                cols: kw,
                                planes: vec![ramp(kh * kw, 3)],
                                scale: 1.0,
                                bias: 0.0,
                            };
                            let case = Case {
                                channels: 1,
                                h,
                                w,
                                input: ramp(h * w, h + w),
                                kernels: vec![k],
                                mode,
                                extent,
                                stride,
                                dilation,
                                op,
                            };
                            if let Err(e) = check(&case) {
                                panic!("{e}");
                            }
                            checked += 1;
                        }
                    }
                }
            }
        }
    }
    assert_eq!(checked, 6 * 6 * 4 * 4 * 5 * 4);
}

#[test]
fn every_strategy_is_bit_identical_for_any_thread_count() {
    let (h, w) = (97, 131);
    let input = Array3::from_shape_vec(
        (2, h, w),
        ramp(2 * h * w, 1).into_iter().map(|v| v as f32).collect(),
    )
    .unwrap();
    let k = |s| Kernel {
        name: format!("k{s}"),
        rows: 5,
        cols: 3,
        planes: vec![ramp(15, s), ramp(15, s + 1)],
        scale: 0.7,
        bias: 0.1,
        origin: None,
        angle: None,
    };
    let stage = ConvStage {
        bank: Bank {
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
            name: "b".into(),
            op: Op::Convolve,
            description: None,
            kernels: vec![k(1), k(2), k(3)],
        },
        options: ConvOptions {
            pad: PadMode::Reflect,
            ..ConvOptions::default()
        },
    };
    let run = |engine: Engine, threads| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| run_conv(&stage, &input, engine).unwrap())
    };
    // (The separable strategy falls back to direct: these kernels are not rank 1;
    // the rank-1 case is covered with the separable tests.)
    for engine in ENGINES {
        let one = run(engine, 1);
        for t in [2, 3, 8] {
            let other = run(engine, t);
            assert!(
                one.iter()
                    .zip(other.iter())
                    .all(|(a, b)| a.to_bits() == b.to_bits()),
                "{engine}: {t} threads differ"
            );
        }
    }
    // Rank-1 kernels, so that the separable strategy itself runs.
    let rank1 = ConvStage {
        bank: tapmap::kernel::builtin::resolve_bank("binomial:size=7+gaussian:sigma=1.5").unwrap(),
        options: ConvOptions {
            pad: PadMode::Symmetric,
            ..ConvOptions::default()
        },
    };
    let grey = input.slice(ndarray::s![0..1, .., ..]).to_owned();
    let run = |threads| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| run_conv(&rank1, &grey, Engine::Separable).unwrap())
    };
    let one = run(1);
    for t in [2, 3, 8] {
        assert!(
            one.iter()
                .zip(run(t).iter())
                .all(|(a, b)| a.to_bits() == b.to_bits()),
            "separable: {t} threads differ"
        );
    }
}

#[test]
fn fft_tiles_equal_the_oracle_on_larger_images() {
    // Images large enough that the FFT strategy cuts them into several tiles
    // (overlap-save), with strides, dilation, several channels and every pad mode.
    let mut seed = 7u64;
    let mut next = || {
        seed = seed
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        ((seed >> 33) as f64 / (1u64 << 31) as f64) * 2.0 - 1.0
    };
    let configs = [
        (1, 150, 130, 9, 9, PadMode::Zero, (1, 1), (1, 1)),
        (2, 121, 140, 7, 5, PadMode::Reflect, (2, 3), (1, 1)),
        (1, 97, 160, 5, 5, PadMode::Wrap, (1, 1), (3, 2)),
        (3, 170, 150, 11, 11, PadMode::Symmetric, (2, 2), (1, 1)),
        (1, 200, 64, 13, 3, PadMode::Replicate, (1, 2), (1, 1)),
    ];
    for (c, h, w, kh, kw, mode, stride, dilation) in configs {
        // That each case needs several tiles is checked beside the FFT
        // strategy (`the_oracle_tests_larger_images_cut_into_several_tiles`).
        let case = Case {
            channels: c,
            h,
            w,
            input: (0..c * h * w).map(|_| next()).collect(),
            kernels: (0..2)
                .map(|_| OracleKernel {
                    rows: kh,
                    cols: kw,
                    planes: (0..c)
                        .map(|_| (0..kh * kw).map(|_| next()).collect())
                        .collect(),
                    scale: 0.5,
                    bias: 0.25,
                })
                .collect(),
            mode,
            extent: Extent::Same,
            stride,
            dilation,
            op: Op::Convolve,
        };
        check(&case).unwrap_or_else(|e| panic!("{e}"));
    }
}
