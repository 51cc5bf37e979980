//! Import speed: a 64×3×7×7 float32 bank from .npy and from safetensors, parsed
//! and turned into a bank. Run with `cargo bench --bench import`.

use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use tapmap::kernel::import::{import_bank, ImportOptions};

fn npy_bytes(shape: &[usize], data: &[f32]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let mut h = format!(
        "{{'descr': '<f4', 'fortran_order': False, 'shape': ({}), }}",
        dims.join(", ")
    );
    while (10 + h.len() + 1) % 64 != 0 {
        h.push(' ');
    }
    h.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend((h.len() as u16).to_le_bytes());
    out.extend(h.as_bytes());
    out.extend(data.iter().flat_map(|v| v.to_le_bytes()));
    out
}

fn import(c: &mut Criterion) {
    let dir = tempfile::TempDir::new().expect("temp dir");
    let shape = [64usize, 3, 7, 7];
    let data: Vec<f32> = (0..64 * 3 * 49)
        .map(|i| ((i * 37 % 101) as f32 - 50.0) / 100.0)
        .collect();
    let npy = dir.path().join("w.npy");
    std::fs::write(&npy, npy_bytes(&shape, &data)).expect("write");
    let raw: Vec<u8> = data.iter().flat_map(|v| v.to_le_bytes()).collect();
    let view = safetensors::tensor::TensorView::new(safetensors::Dtype::F32, shape.to_vec(), &raw)
        .expect("view");
    let st = dir.path().join("w.safetensors");
    std::fs::write(
        &st,
        safetensors::serialize(vec![("conv1.weight".to_string(), view)], None).expect("serialize"),
    )
    .expect("write");
    let mut g = c.benchmark_group("import_64x3x7x7");
    g.throughput(Throughput::Elements(1));
    g.bench_function("npy", |b| {
        b.iter(|| import_bank(&npy, &ImportOptions::default()).expect("import"))
    });
    g.bench_function("safetensors", |b| {
        b.iter(|| import_bank(&st, &ImportOptions::default()).expect("import"))
    });
    g.finish();
}

criterion_group!(benches, import);
criterion_main!(benches);
