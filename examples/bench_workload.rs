//! Times one conv workload in-process for the side-by-side comparison script
//! (`bench/compare.sh`): reads an input `.npy` (C×H×W or H×W float32), runs a bank
//! with the given options `runs` times, prints the median of all runs, the median
//! of the runs after the first (buffers reused, as for every image after the
//! first in a batch) and all times in seconds as one JSON line, and writes the
//! result to OUT.npy for the agreement check.
//!
//! Usage: bench_workload INPUT.npy BANK PAD EXTENT STRIDE RUNS OUT.npy [ACT POOL]

use std::time::Instant;

use ndarray::{Array2, Array3};
use ndarray_npy::{ReadNpyExt, WriteNpyExt};
use tapmap::border::PadMode;
use tapmap::engine::{ConvOptions, ConvStage, Engine};
use tapmap::geometry::{Extent, PadWidth};
use tapmap::kernel::builtin::resolve_bank;
use tapmap::pipeline::Plan;
use tapmap::stage::{Activation, Pool, PoolKind, PoolWindow, Recipe, Stage};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let a: Vec<String> = std::env::args().collect();
    if a.len() < 8 {
        return Err(
            "usage: bench_workload INPUT.npy BANK PAD EXTENT STRIDE RUNS OUT.npy [relu maxpool2]"
                .into(),
        );
    }
    let f = std::fs::File::open(&a[1])?;
    let input: Array3<f32> = match Array3::<f32>::read_npy(f) {
        Ok(x) => x,
        Err(_) => {
            let x = Array2::<f32>::read_npy(std::fs::File::open(&a[1])?)?;
            let (h, w) = x.dim();
            x.into_shape_with_order((1, h, w))?
        }
    };
    let extent = match a[4].as_str() {
        e @ ("same" | "valid" | "full") => e.parse::<Extent>()?,
        n => Extent::Explicit(n.parse::<PadWidth>()?),
    };
    let stride: usize = a[5].parse()?;
    let conv = ConvStage {
        bank: resolve_bank(&a[2])?,
        options: ConvOptions {
            op: None,
            pad: a[3].parse::<PadMode>()?,
            extent,
            stride: (stride, stride),
            dilation: (1, 1),
        },
    };
    let mut stages = vec![Stage::Conv(conv)];
    if a.get(8).map(String::as_str) == Some("relu") {
        stages.push(Stage::Act(Activation::Relu));
    }
    if a.get(9).map(String::as_str) == Some("maxpool2") {
        stages.push(Stage::Pool(Pool {
            kind: PoolKind::Max,
            window: PoolWindow::Sized {
                size: (2, 2),
                stride: (2, 2),
            },
        }));
    }
    let recipe = Recipe { stages };
    let runs: usize = a[6].parse()?;
    // TAPMAP_BENCH_FUSE=0 runs conv, act and pool one after another, to measure
    // what running them in bands saves.
    let fuse = std::env::var("TAPMAP_BENCH_FUSE").map_or(true, |v| v != "0");
    let mut times = Vec::with_capacity(runs);
    let mut out = None;
    let mut plan: Option<Plan> = None;
    for _ in 0..runs {
        let t = Instant::now();
        // A batch makes the plan for an input shape once, with its first image.
        let p = match &plan {
            Some(p) => p,
            None if fuse => plan.insert(Plan::new(&recipe, input.dim(), Engine::Auto)?),
            None => plan.insert(Plan::unfused(&recipe, input.dim(), Engine::Auto)?),
        };
        // As a batch does after writing an image's maps: their memory serves
        // the next image.
        if let Some(old) = out.take() {
            p.give_back(old);
        }
        let y = p.run(input.view())?;
        times.push(t.elapsed().as_secs_f64());
        out = Some(y);
    }
    let mut sorted = times.clone();
    sorted.sort_by(f64::total_cmp);
    let median = sorted[sorted.len() / 2];
    // Runs after the first, as every image after the first of a batch: buffers
    // already written are reused.
    let mut warm = times[1.min(times.len() - 1)..].to_vec();
    warm.sort_by(f64::total_cmp);
    let warm_median = warm[warm.len() / 2];
    if let Some(y) = out {
        y.write_npy(std::fs::File::create(&a[7])?)?;
    }
    let plan = plan.expect("at least one run");
    let plan = plan.sizes();
    let engine = plan[0]
        .engine
        .as_ref()
        .map_or("-".to_string(), |e| e.engine.to_string());
    let madds: u128 = plan
        .iter()
        .filter(|p| p.kind == "conv")
        .map(|p| p.operations)
        .sum();
    println!(
        "{{\"median_s\": {median}, \"warm_median_s\": {warm_median}, \"times_s\": {times:?}, \"engine\": \"{engine}\", \"multiply_adds\": {madds}}}"
    );
    Ok(())
}
