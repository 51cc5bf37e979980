//! The public library API called with wrong shapes and lengths: every call
//! gives an `Err` that says what does not fit, or panics with a message;
//! none reads or writes out of bounds (the engine's strategies, prepared
//! stages and buffers are private, so only these entry points exist).

use ndarray::Array3;
use tapmap::engine::{run_conv, ConvOptions, ConvStage, Engine};
use tapmap::geometry::Extent;
use tapmap::kernel::builtin::resolve_bank;
use tapmap::kernel::{Bank, Kernel, Op};
use tapmap::pipeline::{run_recipe, Plan};
use tapmap::stage::{Pool, PoolKind, PoolWindow, Recipe, Stage};

fn stage(bank: &str) -> ConvStage {
    ConvStage {
        bank: resolve_bank(bank).unwrap(),
        options: ConvOptions::default(),
    }
}

fn message(r: Result<Array3<f32>, tapmap::Error>) -> String {
    r.expect_err("a wrong shape must be refused").to_string()
}

#[test]
fn a_plan_refuses_an_input_of_another_shape() {
    let recipe = Recipe {
        stages: vec![Stage::Conv(stage("sobel-x+sobel-y"))],
    };
    let plan = Plan::new(&recipe, (1, 32, 40), Engine::Auto).unwrap();
    for dim in [(1, 32, 41), (1, 31, 40), (2, 32, 40), (1, 1, 1)] {
        let e = message(plan.run(Array3::<f32>::zeros(dim).view()));
        assert!(e.contains("plan made for 1×32×40"), "{e}");
    }
    // A view with strides of its own (every other column) is read, not refused.
    let wide = Array3::<f32>::ones((1, 32, 80));
    let strided = wide.slice(ndarray::s![.., .., ..;2]);
    assert_eq!(plan.run(strided).unwrap().dim(), (2, 32, 40));
    // Any array may be handed back, even one whose memory starts at an offset.
    plan.give_back(wide.slice_move(ndarray::s![.., 1.., ..]));
}

#[test]
fn every_engine_refuses_banks_that_do_not_fit_the_input() {
    let rgb = Array3::<f32>::zeros((3, 16, 16));
    for engine in [
        Engine::Auto,
        Engine::Reference,
        Engine::Direct,
        Engine::Separable,
        Engine::Matmul,
        Engine::Fft,
    ] {
        let e = message(run_conv(&stage("edges"), &rgb, engine));
        assert!(
            e.contains("1 plane(s) but its input has 3"),
            "{engine}: {e}"
        );
        // A kernel larger than the padded input under `valid`.
        let mut valid = stage("gaussian:sigma=3");
        valid.options.extent = Extent::Valid;
        let e = message(run_conv(&valid, &Array3::zeros((1, 5, 40)), engine));
        assert!(e.contains("larger than the padded input"), "{engine}: {e}");
    }
}

#[test]
fn hand_built_kernels_with_wrong_lengths_are_refused_before_any_work() {
    // Bank and Kernel fields are public: a caller can build one whose planes do
    // not hold rows × cols taps; it is refused, never indexed past its end.
    let bad = |planes: Vec<Vec<f64>>, rows, cols| ConvStage {
        bank: Bank {
            name: "hand".into(),
            op: Op::Correlate,
            description: None,
            normalize: None,
            contrast: None,
            provenance: None,
            pad: None,
            kernels: vec![Kernel {
                name: "k".into(),
                rows,
                cols,
                planes,
                scale: 1.0,
                bias: 0.0,
                origin: None,
                angle: None,
            }],
        },
        options: ConvOptions::default(),
    };
    let x = Array3::<f32>::ones((1, 8, 8));
    for (planes, rows, cols, says) in [
        (vec![vec![1.0; 8]], 3, 3, "has 8 taps, expected 3×3"),
        (vec![vec![1.0; 10]], 3, 3, "has 10 taps, expected 3×3"),
        (vec![], 3, 3, "has no planes"),
        (vec![vec![]], 0, 0, "has no taps"),
        (vec![vec![f64::NAN; 9]], 3, 3, "non-finite tap"),
        (vec![vec![1e39; 9]], 3, 3, "too large for float32"),
    ] {
        for engine in [
            Engine::Direct,
            Engine::Matmul,
            Engine::Fft,
            Engine::Separable,
        ] {
            let e = message(run_conv(&bad(planes.clone(), rows, cols), &x, engine));
            assert!(e.contains(says), "{engine}: {e}");
        }
    }
    // A bank whose kernels take different channel counts.
    let mut two = stage("sobel-x+sobel-y");
    two.bank.kernels[1].planes.push(vec![0.0; 9]);
    let e = message(run_conv(&two, &x, Engine::Direct));
    assert!(e.contains("same input channels"), "{e}");
}

#[test]
fn pools_and_recipes_refuse_windows_larger_than_their_maps() {
    let pool = Pool {
        kind: PoolKind::Max,
        window: PoolWindow::Sized {
            size: (4, 4),
            stride: (4, 4),
        },
    };
    let e = message(pool.apply(&Array3::zeros((2, 3, 9))));
    assert!(
        e.contains("window height 4 is larger than its input height 3"),
        "{e}"
    );
    let recipe = Recipe {
        stages: vec![Stage::Conv(stage("sobel-x")), Stage::Pool(pool)],
    };
    let e = message(run_recipe(
        &recipe,
        Array3::zeros((1, 3, 9)).view(),
        Engine::Auto,
    ));
    assert!(e.contains("stage 2 (pool)"), "{e}");
    // A stride of 0 set by hand is refused, not divided by.
    let mut zero = stage("sobel-x");
    zero.options.stride = (0, 1);
    let e = message(run_conv(&zero, &Array3::zeros((1, 8, 8)), Engine::Auto));
    assert!(e.contains("stride along the height is 0"), "{e}");
}

#[test]
fn pictures_and_files_check_their_lengths() {
    use tapmap::render::view::{mapping, render};
    let m = mapping(&[0.0, 1.0], false, None, false);
    let short = std::panic::catch_unwind(|| render(&[0.0; 5], 2, 3, &m));
    let Err(panic) = short else {
        panic!("too few samples were drawn")
    };
    let msg = panic.downcast::<String>().unwrap();
    assert!(msg.contains("a 2×3 view needs 6 samples, given 5"), "{msg}");
    let t = tempfile::TempDir::new().unwrap();
    let e = tapmap::image_io::write_f32_tiff(&t.path().join("x.tif"), &[0.0; 5], 2, 3)
        .unwrap_err()
        .to_string();
    assert!(e.contains("needs 6 samples, given 5"), "{e}");
    assert!(!t.path().join("x.tif").exists());
    assert!(tapmap::stats::percentile(&mut [], 50.0).is_nan());
    assert_eq!(tapmap::stats::percentile(&mut [3.0, 1.0, 2.0], 150.0), 3.0);
}
