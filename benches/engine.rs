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
        for engine in [Engine::Reference, Engine::Direct] {
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

criterion_group!(benches, engines);
criterion_main!(benches);
