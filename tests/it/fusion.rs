//! conv → act → pool run in bands of pooled rows (the conv map never whole) must
//! give exactly, bit for bit, what the stages give one after another.

use ndarray::Array3;
use tapmap::border::PadMode;
use tapmap::engine::{ConvOptions, ConvStage, Engine};
use tapmap::geometry::Extent;
use tapmap::kernel::builtin::resolve_bank;
use tapmap::kernel::{Bank, Kernel, Op};
use tapmap::pipeline::Plan;
use tapmap::stage::{Activation, Pool, PoolKind, PoolWindow, Recipe, Stage};

fn input(c: usize, h: usize, w: usize) -> Array3<f32> {
    Array3::from_shape_fn((c, h, w), |(k, y, x)| {
        (((x * 37 + y * 101 + k * 13 + x * y) % 211) as f32 - 105.0) / 53.0
    })
}

fn learned(n: usize, c: usize, k: usize) -> Bank {
    Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "learned".into(),
        op: Op::Correlate,
        description: None,
        kernels: (0..n)
            .map(|i| Kernel {
                name: format!("f{i}"),
                rows: k,
                cols: k,
                planes: (0..c)
                    .map(|j| {
                        (0..k * k)
                            .map(|t| (((t * 7 + i * 5 + j * 3) % 13) as f64 - 6.0) / 7.0)
                            .collect()
                    })
                    .collect(),
                scale: 1.0,
                bias: 0.05 * i as f64,
                origin: None,
                angle: None,
            })
            .collect(),
    }
}

#[test]
fn fused_bands_equal_the_stages_one_by_one() {
    // (bank, channels, engine): each strategy that runs in bands.
    let banks = [
        (resolve_bank("edges").unwrap(), 1, Engine::Direct),
        (
            resolve_bank("binomial:size=7+gaussian:sigma=1").unwrap(),
            1,
            Engine::Separable,
        ),
        (learned(16, 3, 5), 3, Engine::Matmul),
        (learned(3, 2, 3), 2, Engine::Reference),
    ];
    let pools = [
        ((2, 2), (2, 2)),
        ((3, 3), (2, 2)), // overlapping windows: rows shared by two bands
        ((2, 3), (3, 2)), // gaps between windows
        ((5, 1), (1, 1)),
    ];
    let mut checked = 0;
    for (bank, c, engine) in &banks {
        for (stride, pad) in [((1, 1), PadMode::Reflect), ((2, 1), PadMode::Zero)] {
            for (size, pstride) in pools {
                for act in [
                    None,
                    Some(Activation::Relu),
                    Some(Activation::LeakyRelu(0.1)),
                ] {
                    for kind in [PoolKind::Max, PoolKind::Mean] {
                        let mut stages = vec![Stage::Conv(ConvStage {
                            bank: bank.clone(),
                            options: ConvOptions {
                                pad,
                                extent: Extent::Same,
                                stride,
                                ..ConvOptions::default()
                            },
                        })];
                        if let Some(a) = act {
                            stages.push(Stage::Act(a));
                        }
                        stages.push(Stage::Pool(Pool {
                            kind,
                            window: PoolWindow::Sized {
                                size,
                                stride: pstride,
                            },
                        }));
                        let x = input(*c, 203, 45);
                        let recipe = Recipe { stages };
                        // The banded path must really be taken here.
                        let fused_plan = Plan::new(&recipe, x.dim(), *engine).unwrap();
                        assert_eq!(fused_plan.fused(), 1, "{engine}: not banded");
                        let plain_plan = Plan::unfused(&recipe, x.dim(), *engine).unwrap();
                        assert_eq!(plain_plan.fused(), 0);
                        // Tall enough for several bands, odd so edges go unused.
                        let fused = fused_plan.run(x.view()).unwrap();
                        let plain = plain_plan.run(x.view()).unwrap();
                        assert_eq!(fused.dim(), plain.dim());
                        let same = fused
                            .iter()
                            .zip(plain.iter())
                            .all(|(a, b)| a.to_bits() == b.to_bits());
                        assert!(
                            same,
                            "{engine} stride {stride:?} pool {size:?}/{pstride:?} {act:?} {kind:?}"
                        );
                        checked += 1;
                    }
                }
            }
        }
    }
    assert_eq!(checked, 4 * 2 * 4 * 3 * 2);
}
