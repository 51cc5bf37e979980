//! The border study against analytic cases (sources beside each) and a real texture.

use ndarray::Array3;
use tapmap::border::PadMode;
use tapmap::engine::{ConvOptions, ConvStage, Engine};
use tapmap::geometry::Extent;
use tapmap::jobs::borders::{study, ImageStudy};
use tapmap::kernel::builtin::resolve_bank;
use tapmap::kernel::{Bank, Kernel, Op};
use tapmap::pipeline::Plan;
use tapmap::stage::{Recipe, Stage};

const ALL: [PadMode; 5] = PadMode::ALL;

fn conv(bank: Bank, extent: Extent, stride: usize) -> Stage {
    Stage::Conv(ConvStage {
        bank,
        options: ConvOptions {
            op: None,
            pad: PadMode::Zero,
            extent,
            stride: (stride, stride),
            dilation: (1, 1),
        },
    })
}

fn family(spec: &str) -> Bank {
    resolve_bank(spec).unwrap()
}

fn taps(rows: &[Vec<f64>]) -> Bank {
    Bank {
        normalize: None,
        contrast: None,
        provenance: None,
        pad: None,
        name: "t".into(),
        op: Op::Correlate,
        description: None,
        kernels: vec![Kernel::from_rows("k", rows).unwrap()],
    }
}

fn run(recipe: &Recipe, img: &Array3<f32>, modes: &[PadMode], crop: Option<usize>) -> ImageStudy {
    let names = recipe.channel_names(1);
    study(
        recipe,
        img.view(),
        &names,
        modes,
        1e-6,
        crop,
        Engine::Direct,
    )
    .unwrap()
}

/// Mode `m`'s maps, read on the study's ring (the whole map for these small images).
fn map_of(st: &ImageStudy, modes: &[PadMode], m: PadMode) -> Array3<f32> {
    let ring = &st.maps[modes.iter().position(|x| *x == m).unwrap()];
    Array3::from_shape_fn(ring.shape(), |(k, y, x)| ring.get(k, y, x))
}

#[test]
fn constant_image_and_a_normalised_kernel() {
    // Every mode but zero repeats the constant, so a normalised kernel reproduces it;
    // zero gives 4/9 at a 3×3 box's corner and 6/9 along an edge (from the definition;
    // common practice, no source).
    let img = Array3::from_elem((1, 9, 11), 0.75f32);
    let recipe = Recipe {
        stages: vec![conv(family("box:size=3"), Extent::Same, 1)],
    };
    let others = [
        PadMode::Replicate,
        PadMode::Reflect,
        PadMode::Symmetric,
        PadMode::Wrap,
    ];
    let st = run(&recipe, &img, &others, None);
    assert_eq!(st.channels[0].band, [0; 4]);
    for m in &st.maps {
        assert!(m.values().all(|v| (v - 0.75).abs() < 1e-6));
    }
    let st = run(&recipe, &img, &ALL, None);
    let z = map_of(&st, &ALL, PadMode::Zero);
    assert!((z[[0, 0, 0]] - 0.75 * 4.0 / 9.0).abs() < 1e-6);
    assert!((z[[0, 0, 5]] - 0.75 * 6.0 / 9.0).abs() < 1e-6);
    assert!((z[[0, 4, 5]] - 0.75).abs() < 1e-6);
    assert_eq!(st.channels[0].band, [1; 4]);
}

#[test]
fn linear_ramp_at_the_border() {
    let a = 0.125f32;
    let img = Array3::from_shape_fn((1, 5, 12), |(_, _, x)| a * x as f32);
    // Central difference [−1 0 1] at x = 0. numpy.pad by 1 (NumPy reference, numpy.pad):
    // reflect gives [a | 0 a 2a …], symmetric [0 | 0 a 2a …], so the response is
    // a − a = 0 under reflect and a − 0 = a under symmetric.
    let recipe = Recipe {
        stages: vec![conv(taps(&[vec![-1.0, 0.0, 1.0]]), Extent::Same, 1)],
    };
    let st = run(&recipe, &img, &ALL, None);
    assert_eq!(map_of(&st, &ALL, PadMode::Reflect)[[0, 2, 0]], 0.0);
    assert_eq!(map_of(&st, &ALL, PadMode::Symmetric)[[0, 2, 0]], a);
    assert_eq!(map_of(&st, &ALL, PadMode::Replicate)[[0, 2, 0]], a);
    assert_eq!(map_of(&st, &ALL, PadMode::Wrap)[[0, 2, 0]], a - 11.0 * a);
    // Forward difference [−1 1] under `same` pads one sample after: replicate repeats
    // the edge sample, so the derivative across the border is 0.
    let recipe = Recipe {
        stages: vec![conv(taps(&[vec![-1.0, 1.0]]), Extent::Same, 1)],
    };
    let st = run(&recipe, &img, &ALL, None);
    assert_eq!(map_of(&st, &ALL, PadMode::Replicate)[[0, 2, 11]], 0.0);
    assert_eq!(map_of(&st, &ALL, PadMode::Reflect)[[0, 2, 11]], -a);
    assert_eq!(
        map_of(&st, &ALL, PadMode::Replicate)[[0, 2, 5]],
        a,
        "interior untouched"
    );
}

#[test]
fn band_equals_half_width_and_adds_up_through_stages() {
    // Receptive-field arithmetic (Dumoulin & Visin 2016): a k×k kernel under `same`
    // reads (k−1)/2 pixels past each edge; stages add their half-widths times the jump.
    let img = Array3::from_shape_fn((1, 24, 30), |(_, y, x)| {
        1.0 + 0.03 * x as f32 + 0.05 * y as f32 + 0.001 * (x * y) as f32
    });
    let one = Recipe {
        stages: vec![conv(family("box:size=5"), Extent::Same, 1)],
    };
    let st = run(&one, &img, &ALL, None);
    assert_eq!(
        (st.channels[0].band, st.channels[0].predicted),
        ([2; 4], [2; 4])
    );
    let two = Recipe {
        stages: vec![
            conv(family("box:size=5"), Extent::Same, 1),
            conv(family("box:size=3"), Extent::Same, 1),
        ],
    };
    let st = run(&two, &img, &ALL, None);
    assert_eq!(
        (st.channels[0].band, st.channels[0].predicted),
        ([3; 4], [3; 4])
    );
    let f = Plan::new(&two, (1, 24, 30), Engine::Auto).unwrap().fields()[0];
    assert_eq!((f.0.size, f.0.jump, f.0.offset), (7, 1, 3));
    // Stride 2 under `same` on 30 columns: total padding (15−1)·2 + 3 − 30 = 1, all
    // after; so no output at the left reads padding and one at the right does.
    let strided = Recipe {
        stages: vec![conv(family("box:size=3"), Extent::Same, 2)],
    };
    let st = run(&strided, &img, &ALL, None);
    assert_eq!(st.channels[0].predicted, [0, 1, 0, 1]);
    assert_eq!(st.channels[0].band, [0, 1, 0, 1]);
    // The measured band never exceeds the prediction.
    for spec in ["gaussian:sigma=1.5", "sobel-x", "log:sigma=1"] {
        let r = Recipe {
            stages: vec![conv(family(spec), Extent::Same, 1)],
        };
        let st = run(&r, &img, &ALL, None);
        for e in 0..4 {
            assert!(
                st.channels[0].band[e] <= st.channels[0].predicted[e],
                "{spec}"
            );
        }
    }
}

#[test]
fn periodic_image_under_wrap_matches_its_surroundings_exactly() {
    // A pattern with period 8 in both directions, cropped by 16 (two periods): the
    // window is itself periodic, so `wrap` supplies exactly the missing pixels.
    let img = Array3::from_shape_fn((1, 64, 72), |(_, y, x)| {
        ((x % 8) as f32 * 0.7).sin()
            + ((y % 8) as f32 * 1.3).cos() * 0.5
            + ((x + 2 * y) % 8) as f32 * 0.01
    });
    let recipe = Recipe {
        stages: vec![conv(family("gaussian:sigma=1.5"), Extent::Same, 1)],
    };
    let st = run(&recipe, &img, &ALL, Some(16));
    assert_eq!(st.crop_truth_clean, Some(true));
    let ch = &st.channels[0];
    let wrap = &ch.crop.iter().find(|(m, _)| *m == PadMode::Wrap).unwrap().1;
    assert!(
        wrap.iter().all(|d| d.max < 1e-5),
        "{:?}",
        wrap.iter().map(|d| d.max).collect::<Vec<_>>()
    );
    let zero = &ch.crop.iter().find(|(m, _)| *m == PadMode::Zero).unwrap().1;
    assert!(
        zero[0].max > 0.1,
        "zero padding does not stand in for a periodic surround"
    );
}

#[test]
fn real_texture_ranks_the_modes_stably() {
    // tests/data/gravel-crop-128.png: CC0 texture (CC0Textures Gravel04 via scikit-image
    // 0.26.0's data folder; see tests/data/README.md). Gaussian σ = 2 (radius 6), crop 16.
    // Figures measured by tapmap on 2026-12-02 (mean |error| inside the predicted band,
    // response units, image scaled to [0, 1]).
    let path =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/gravel-crop-128.png");
    let img = tapmap::image_io::read_image(&path, &Default::default())
        .unwrap()
        .data;
    let recipe = Recipe {
        stages: vec![conv(family("gaussian:sigma=2"), Extent::Same, 1)],
    };
    let st = run(&recipe, &img, &ALL, Some(16));
    let summary = tapmap::jobs::borders::output::summarise(&st);
    let recorded = [
        (PadMode::Replicate, 0.006113994583763458),
        (PadMode::Symmetric, 0.0076249108270362576),
        (PadMode::Reflect, 0.010198102981128075),
        (PadMode::Wrap, 0.020607991516590117),
        (PadMode::Zero, 0.06805305859005009),
    ];
    let mut ranked: Vec<(PadMode, f64)> = summary
        .iter()
        .map(|s| (s.mode, s.crop_mean.unwrap()))
        .collect();
    ranked.sort_by(|a, b| a.1.total_cmp(&b.1));
    assert_eq!(
        ranked.iter().map(|r| r.0).collect::<Vec<_>>(),
        recorded.iter().map(|r| r.0).collect::<Vec<_>>()
    );
    for ((_, got), (m, want)) in ranked.iter().zip(recorded) {
        assert!(
            (got - want).abs() <= 1e-3 * want,
            "{m}: {got} vs recorded {want}"
        );
    }
    assert_eq!(st.channels[0].band, [6; 4]);
}

#[test]
fn borders_command_writes_csvs_views_and_plots() {
    let t = tempfile::TempDir::new().unwrap();
    let sample =
        std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("sample_data/line-a/s2-edge");
    let out = t.path().join("b");
    let o = assert_cmd::cargo::cargo_bin_cmd!("tapmap")
        .args([
            "borders",
            "--bank",
            "edges",
            "--crop",
            "8",
            "--modes",
            "zero,reflect,wrap",
            "-o",
        ])
        .arg(&out)
        .arg(&sample)
        .assert()
        .success()
        .get_output()
        .stdout
        .clone();
    let text = String::from_utf8(o).unwrap();
    assert!(
        text.contains("tile-0004-chip.png") && text.contains("<- closest to the real surroundings"),
        "{text}"
    );
    for f in [
        "borders.csv",
        "bands.csv",
        "summary.csv",
        "plot.png",
        "plots/tile-0004-chip.png",
        "views/tile-0004-chip/00-sobel-x/reflect.png",
    ] {
        assert!(out.join(f).is_file(), "{f}");
    }
    let plot = image::open(out.join("plot.png")).unwrap();
    assert_eq!((plot.width(), plot.height()), (720, 440));
    let csv = std::fs::read_to_string(out.join("borders.csv")).unwrap();
    assert!(csv.starts_with("path,study,channel,name,mode,distance,mean_abs,max_abs,pixels\n"));
    assert!(csv.contains(",crop,") && csv.contains(",modes,"));
    assert_cmd::cargo::cargo_bin_cmd!("tapmap")
        .args(["borders", "--bank", "edges", "--modes", "zero", "-o"])
        .arg(&out)
        .arg(&sample)
        .assert()
        .code(2)
        .stderr(predicates::str::contains("at least two pad modes"));
}

#[test]
fn difference_views_say_what_they_show() {
    let t = tempfile::TempDir::new().unwrap();
    let out = t.path().join("o");
    let input = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("sample_data/line-a/s1-glaze/tile-0001-crack.png");
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_tapmap"))
        .args(["borders", "--bank", "sobel-x", "-q", "-o"])
        .arg(&out)
        .arg(&input)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let v = image::open(out.join("views/tile-0001-crack/00-sobel-x/zero.png"))
        .unwrap()
        .to_rgb8();
    // The map (256×192) with two caption lines under it.
    assert!(
        v.height() >= 192 + 2 * tapmap::render::text::LINE,
        "{:?}",
        v.dimensions()
    );
    let caption = (192..v.height()).flat_map(|y| (0..v.width()).map(move |x| (x, y)));
    let (mut ink, mut amber, mut cyan) = (0, 0, 0);
    for (x, y) in caption {
        let p = v.get_pixel(x, y).0;
        if p[0] > 150 && p[0] == p[1] && p[1] == p[2] {
            ink += 1;
        }
        if p[0] > 150 && p[2] < 100 {
            amber += 1;
        }
        if p[2] > 150 && p[0] < 100 {
            cyan += 1;
        }
    }
    assert!(ink > 200, "{ink} text pixels");
    assert!(
        amber >= 100 && cyan >= 100,
        "swatches: amber {amber}, cyan {cyan}"
    );
    // And the grey scale as a bar: black at its left end, white at its right.
    let last = v.height() - 3;
    assert_eq!(v.get_pixel(4, last).0, [0, 0, 0]);
    assert_eq!(v.get_pixel(4 + 255, last).0, [255, 255, 255]);
}
