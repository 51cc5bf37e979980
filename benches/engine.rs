//! Engine benchmarks: each strategy against the reference on the same stage.
//! Run with `cargo bench --bench engine`; criterion prints medians.

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use ndarray::Array3;
use tapmap::border::PadMode;
use tapmap::engine::{run_conv, ConvOptions, ConvStage, Engine};
use tapmap::kernel::builtin::resolve_bank;

fn image(h: usize, w: usize) -> Array3<f32> {
    Array3::from_shape_fn((1, h, w), |(_, y, x)| {
        ((x * 31 + y * 17) % 251) as f32 / 251.0
    })
}

fn stage(bank: &str) -> ConvStage {
    ConvStage {
        bank: resolve_bank(bank).expect("bank"),
        options: ConvOptions {
            pad: PadMode::Reflect,
            ..ConvOptions::default()
        },
    }
}

fn engines(c: &mut Criterion) {
    let mut g = c.benchmark_group("conv");
    g.sample_size(10);
    for (bank, size) in [("edges", 256), ("gaussian:sigma=2", 256), ("texture", 128)] {
        let img = image(size, size);
        let st = stage(bank);
        g.throughput(Throughput::Elements((size * size) as u64));
        for engine in [Engine::Reference, Engine::Direct, Engine::Separable] {
            g.bench_with_input(
                BenchmarkId::new(engine.name(), format!("{bank}/{size}")),
                &img,
                |b, img| b.iter(|| run_conv(&st, img, engine).expect("run")),
            );
        }
    }
    for size in [1024, 2048] {
        let img = image(size, size);
        let st = stage("edges");
        g.throughput(Throughput::Elements((size * size) as u64));
        g.bench_with_input(
            BenchmarkId::new("direct", format!("edges/{size}")),
            &img,
            |b, img| b.iter(|| run_conv(&st, img, Engine::Direct).expect("run")),
        );
    }
    g.finish();
}

/// Where separable passes overtake the direct strategy: Gaussians of growing
/// radius on one 1024×1024 image (sets `engine::SEPARABLE_FROM`).
fn separable_threshold(c: &mut Criterion) {
    let mut g = c.benchmark_group("separable_threshold");
    g.sample_size(10);
    let img = image(1024, 1024);
    for radius in [1, 2, 3, 4, 5, 6] {
        let st = stage(&format!(
            "gaussian:sigma={},radius={radius}",
            radius as f64 / 2.0
        ));
        for engine in [Engine::Direct, Engine::Separable] {
            g.bench_with_input(
                BenchmarkId::new(engine.name(), format!("{0}x{0}", 2 * radius + 1)),
                &img,
                |b, img| b.iter(|| run_conv(&st, img, engine).expect("run")),
            );
        }
    }
    g.finish();
}

/// A stage of `n` kernels of `ch` planes of k×k taps given by `tap(kernel,
/// plane, index)`, zero padding, same extent.
fn bank_stage(
    n: usize,
    ch: usize,
    k: usize,
    tap: impl Fn(usize, usize, usize) -> f64,
) -> ConvStage {
    use tapmap::kernel::{Bank, Kernel, Op};
    let kernels = (0..n)
        .map(|i| Kernel {
            name: format!("k{i}"),
            rows: k,
            cols: k,
            planes: (0..ch)
                .map(|c| (0..k * k).map(|t| tap(i, c, t)).collect())
                .collect(),
            scale: 1.0,
            bias: 0.0,
            origin: None,
            angle: None,
        })
        .collect();
    ConvStage {
        bank: Bank {
            name: "b".into(),
            op: Op::Correlate,
            description: None,
            kernels,
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
        },
        options: ConvOptions {
            pad: PadMode::Zero,
            ..ConvOptions::default()
        },
    }
}

/// Where the matrix product overtakes the direct strategy, by bank size
/// (sets `engine::MATMUL_FROM`): random banks of N kernels × C channels × k×k.
fn matmul_threshold(c: &mut Criterion) {
    let mut g = c.benchmark_group("matmul_threshold");
    g.sample_size(10);
    for (n, ch, k, size) in [
        (8, 1, 3, 1024),
        (16, 1, 3, 1024),
        (32, 1, 3, 1024),
        (64, 1, 3, 512),
        (8, 3, 5, 512),
        (16, 3, 7, 512),
        (64, 3, 7, 512),
    ] {
        let st = bank_stage(n, ch, k, |i, c, t| {
            (((i * 31 + c * 7 + t * 13) % 17) as f64 - 8.0) / 8.0
        });
        let img = Array3::from_shape_fn((ch, size, size), |(c, y, x)| {
            ((x * 31 + y * 17 + c * 5) % 251) as f32 / 251.0
        });
        for engine in [Engine::Direct, Engine::Matmul] {
            g.bench_with_input(
                BenchmarkId::new(engine.name(), format!("{n}x{ch}x{k}x{k}/{size}")),
                &img,
                |b, img| b.iter(|| run_conv(&st, img, engine).expect("run")),
            );
        }
    }
    g.finish();
}

/// Where the FFT strategy overtakes direct and matmul for kernels that are not
/// rank 1 (sets `engine::FFT_FROM`): one random k×k kernel, and a bank of 8, on
/// 1024², same extent, zero padding.
fn fft_threshold(c: &mut Criterion) {
    let mut g = c.benchmark_group("fft_threshold");
    g.sample_size(10);
    for (n, k) in [
        (1, 7),
        (1, 9),
        (1, 11),
        (1, 13),
        (1, 15),
        (1, 21),
        (8, 7),
        (8, 11),
        (8, 15),
    ] {
        let st = bank_stage(n, 1, k, |i, _, t| {
            (((i * 31 + t * 13 + t * t) % 17) as f64 - 8.0) / 8.0
        });
        let img = Array3::from_shape_fn((1, 1024, 1024), |(_, y, x)| {
            ((x * 31 + y * 17) % 251) as f32 / 251.0
        });
        for engine in [Engine::Direct, Engine::Matmul, Engine::Fft] {
            if engine == Engine::Matmul && n == 1 {
                continue;
            }
            g.bench_with_input(
                BenchmarkId::new(engine.name(), format!("{n}x{k}x{k}/1024")),
                &img,
                |b, img| b.iter(|| run_conv(&st, img, engine).expect("run")),
            );
        }
    }
    g.finish();
}

criterion_group!(
    benches,
    engines,
    separable_threshold,
    matmul_threshold,
    fft_threshold
);
criterion_main!(benches);
