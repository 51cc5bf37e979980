//! Combine and thin stages, and the edge measures of stats.csv, against
//! longhand computations written here (the NumPy, SciPy and scikit-image
//! comparisons are in tools/check_combine.py, run by .ci/run).

use std::path::Path;

use ndarray::{Array2, Array3};
use ndarray_npy::{ReadNpyExt, WriteNpyExt};
use tapmap::engine::Engine;
use tapmap::kernel::builtin::resolve_bank;
use tapmap::pipeline::Plan;
use tapmap::stage::recipefile::parse_recipe;
use tapmap::stage::{Combine, CombineItem, Recipe, Stage};
use tempfile::TempDir;

use crate::common::tapmap_command;

/// A smooth random field in [0, 1): sums of a few random cosines (xorshift).
fn field(h: usize, w: usize, seed: u64) -> Vec<f32> {
    let mut s = seed | 1;
    let mut next = || {
        s ^= s << 13;
        s ^= s >> 7;
        s ^= s << 17;
        (s % 1_000_000) as f64 / 1_000_000.0
    };
    let waves: Vec<(f64, f64, f64)> = (0..6)
        .map(|_| (next() * 0.5, next() * 0.5, next() * 6.3))
        .collect();
    (0..h * w)
        .map(|i| {
            let (y, x) = ((i / w) as f64, (i % w) as f64);
            let v: f64 = waves
                .iter()
                .map(|(a, b, p)| (a * x + b * y + p).cos())
                .sum();
            (0.5 + v / 12.0 + 0.05 * (next() - 0.5)) as f32
        })
        .collect()
}

fn gradient_recipe(keep: bool) -> Recipe {
    let mut r = Recipe::single(resolve_bank("sobel-x+sobel-y").unwrap(), None, None);
    r.stages.push(Stage::Combine(Combine {
        items: vec![CombineItem::of_all("gradient".parse().unwrap())],
        keep,
    }));
    r
}

// Magnitude and orientation against f64 hypot and atan2 of the same maps
// (definitions: stage::combine; atan2's range (−180, 180] from its
// definition, with −180 written 180).
#[test]
fn magnitude_and_orientation_are_hypot_and_atan2_of_the_pair() {
    let (h, w) = (37, 53);
    let x = Array3::from_shape_vec((1, h, w), field(h, w, 7)).unwrap();
    let maps = Plan::new(&gradient_recipe(true), (1, h, w), Engine::Auto)
        .unwrap()
        .run(x.view())
        .unwrap();
    assert_eq!(maps.dim(), (4, h, w));
    let mut worst = (0.0f64, 0.0f64);
    for r in 0..h {
        for c in 0..w {
            let (gx, gy) = (maps[[0, r, c]] as f64, maps[[1, r, c]] as f64);
            let m = gx.hypot(gy);
            let a = gy.atan2(gx).to_degrees();
            let dm = (maps[[2, r, c]] as f64 - m).abs() / m.max(1e-30);
            let mut da = (maps[[3, r, c]] as f64 - a).rem_euclid(360.0);
            da = da.min(360.0 - da);
            worst = (worst.0.max(dm), worst.1.max(da));
            assert!(maps[[3, r, c]] > -180.0 && maps[[3, r, c]] <= 180.0);
        }
    }
    assert!(worst.0 < 1e-6, "magnitude relative error {}", worst.0);
    assert!(worst.1 < 1e-4, "orientation error {} degrees", worst.1);
    // Dropping the sources leaves the same two maps.
    let only = Plan::new(&gradient_recipe(false), (1, h, w), Engine::Auto)
        .unwrap()
        .run(x.view())
        .unwrap();
    assert_eq!(only.dim(), (2, h, w));
    assert_eq!(
        only.as_slice().unwrap(),
        &maps.as_slice().unwrap()[2 * h * w..]
    );
}

// The conv step that leaves room for a kept combine's maps (no copy) gives
// what the stages run one by one give, bit for bit.
#[test]
fn room_after_the_conv_maps_changes_nothing() {
    let (h, w) = (64, 70);
    let x = Array3::from_shape_vec((1, h, w), field(h, w, 3)).unwrap();
    let r = gradient_recipe(true);
    let fused = Plan::new(&r, (1, h, w), Engine::Auto).unwrap();
    let plain = Plan::unfused(&r, (1, h, w), Engine::Auto).unwrap();
    for _ in 0..3 {
        // Runs reuse buffers: the second and third use what the first left.
        let (a, b) = (fused.run(x.view()).unwrap(), plain.run(x.view()).unwrap());
        assert_eq!(a, b);
        fused.give_back(a);
    }
}

// Oriented energy peaks at the grating's orientation: a Gabor kernel at θ
// responds most to a grating varying along θ (a fact of the filter's
// definition: its carrier is cos(2πx'/λ), x' along θ; Daugman 1985).
#[test]
fn gabor_energy_peaks_at_the_grating_orientation() {
    let bank = tapmap::kernel::bankfile::parse_bank(
        r#"
name = "pair"
op = "correlate"
[[kernel]]
name = "even"
family = "gabor"
params = { sigma = 3.0, wavelength = 6.0, aspect = 0.5 }
"#,
        Path::new("inline.toml"),
    )
    .unwrap();
    // Even and odd kernels every 30°: one bank, angles from theta.
    let mut kernels = Vec::new();
    for t in (0..180).step_by(30) {
        for phase in [0, 90] {
            let spec = tapmap::kernel::FamilySpec {
                family: "gabor".into(),
                params: [
                    ("sigma", 3.0),
                    ("wavelength", 6.0),
                    ("aspect", 0.5),
                    ("theta", t as f64),
                    ("phase", phase as f64),
                ]
                .into_iter()
                .map(|(k, v)| (k.to_string(), v))
                .collect(),
            };
            kernels.push(spec.build(Some(&format!("g{t}-{phase}"))).unwrap());
        }
    }
    let bank = tapmap::kernel::Bank { kernels, ..bank };
    let mut recipe = Recipe::single(bank, None, None);
    recipe.stages.push(Stage::Combine(Combine {
        items: vec![CombineItem::of_all("gabor-energy".parse().unwrap())],
        keep: false,
    }));
    let (h, w) = (64, 64);
    for truth in [0.0f64, 60.0, 120.0] {
        let (s, c) = truth.to_radians().sin_cos();
        let img: Vec<f32> = (0..h * w)
            .map(|i| {
                let (y, x) = ((i / w) as f64, (i % w) as f64);
                (0.5 + 0.4 * (std::f64::consts::TAU * (x * c + y * s) / 6.0).cos()) as f32
            })
            .collect();
        let x = Array3::from_shape_vec((1, h, w), img).unwrap();
        let plan = Plan::new(&recipe, (1, h, w), Engine::Auto).unwrap();
        let names = plan.channel_names();
        assert_eq!(names.len(), 6 + 2, "{names:?}");
        assert_eq!(names[6..], ["strongest", "angle"]);
        let maps = plan.run(x.view()).unwrap();
        // Inside, away from the border.
        let mean = |k: usize| {
            let mut s = 0.0;
            for r in 16..48 {
                for cc in 16..48 {
                    s += maps[[k, r, cc]] as f64;
                }
            }
            s
        };
        let best = (0..6).max_by(|a, b| mean(*a).total_cmp(&mean(*b))).unwrap();
        assert_eq!(names[best], format!("energy-{truth}"));
        for r in 16..48 {
            for cc in 16..48 {
                assert_eq!(maps[[7, r, cc]] as f64, truth, "angle at {r},{cc}");
            }
        }
        // Energy = even² + odd²: phase-invariant, so nearly flat along the grating.
        let e: Vec<f32> = (16..48).map(|cc| maps[[best, 32, cc]]).collect();
        let (lo, hi) = e
            .iter()
            .fold((f32::MAX, f32::MIN), |a, v| (a.0.min(*v), a.1.max(*v)));
        assert!(lo > 0.8 * hi, "energy varies from {lo} to {hi}");
    }
}

/// Flood fill: the obviously correct components (area, bbox, Σx, Σy), in
/// raster order of first pixel.
type Comp = (u64, usize, usize, usize, usize, f64, f64);
fn flood(v: &[f32], w: usize, h: usize, t: f32, eight: bool) -> Vec<Comp> {
    let mut seen = vec![false; w * h];
    let mut out = Vec::new();
    for s in 0..w * h {
        if v[s] <= t || seen[s] {
            continue;
        }
        seen[s] = true;
        let mut stack = vec![s];
        let mut c: Comp = (0, usize::MAX, usize::MAX, 0, 0, 0.0, 0.0);
        while let Some(p) = stack.pop() {
            let (r, x) = (p / w, p % w);
            c.0 += 1;
            c.1 = c.1.min(x);
            c.2 = c.2.min(r);
            c.3 = c.3.max(x);
            c.4 = c.4.max(r);
            c.5 += x as f64;
            c.6 += r as f64;
            for dr in -1i64..=1 {
                for dc in -1i64..=1 {
                    if (dr == 0 && dc == 0) || (!eight && dr != 0 && dc != 0) {
                        continue;
                    }
                    let (rr, xx) = (r as i64 + dr, x as i64 + dc);
                    if rr < 0 || xx < 0 || rr >= h as i64 || xx >= w as i64 {
                        continue;
                    }
                    let q = rr as usize * w + xx as usize;
                    if v[q] > t && !seen[q] {
                        seen[q] = true;
                        stack.push(q);
                    }
                }
            }
        }
        out.push(c);
    }
    out
}

fn stats_rows(dir: &Path) -> Vec<csv::StringRecord> {
    let mut r = csv::Reader::from_path(dir.join("stats.csv")).unwrap();
    r.records().map(|x| x.unwrap()).collect()
}

// components, largest_area, the inclusive box and the centroid in stats.csv
// equal a flood fill's, for both connectivities, through the whole command.
#[test]
fn stats_components_equal_a_flood_fill() {
    let t = TempDir::new().unwrap();
    let cases = [(23usize, 31usize, 11u64), (40, 17, 5), (64, 64, 9)];
    for (i, (h, w, seed)) in cases.iter().enumerate() {
        let v = field(*h, *w, *seed);
        let a = Array2::from_shape_vec((*h, *w), v).unwrap();
        let mut f = std::fs::File::create(t.path().join(format!("m{i}.npy"))).unwrap();
        a.write_npy(&mut f).unwrap();
    }
    for conn in ["8", "4"] {
        let out = t.path().join(format!("out{conn}"));
        let mut cmd = tapmap_command();
        cmd.args(["apply", "-q", "--bank", "identity", "--pad", "zero"])
            .args([
                "--threshold",
                "0.55",
                "--connectivity",
                conn,
                "--save",
                "stats,maps",
            ])
            .arg("--out")
            .arg(&out);
        for i in 0..cases.len() {
            cmd.arg(t.path().join(format!("m{i}.npy")));
        }
        let o = cmd.output().unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let rows = stats_rows(&out);
        assert_eq!(rows.len(), cases.len());
        for (i, (h, w, _)) in cases.iter().enumerate() {
            let maps = Array3::<f32>::read_npy(
                std::fs::File::open(out.join(format!("maps/m{i}.npy"))).unwrap(),
            )
            .unwrap();
            let v = maps.as_slice().unwrap();
            let comps = flood(v, *w, *h, 0.55, conn == "8");
            let row = rows.iter().find(|r| r[0] == format!("m{i}.npy")).unwrap();
            let col = |n: usize| row[n].to_string();
            assert_eq!(
                col(17),
                comps.len().to_string(),
                "components m{i} conn {conn}"
            );
            let big = comps.iter().map(|c| c.0).max().unwrap_or(0);
            // Ties go to the first in raster order.
            let l = comps.iter().find(|c| c.0 == big).unwrap();
            assert_eq!(col(18), l.0.to_string());
            assert_eq!(
                [col(19), col(20), col(21), col(22)],
                [l.1, l.2, l.3, l.4].map(|v| v.to_string())
            );
            let (cx, cy): (f64, f64) = (col(23).parse().unwrap(), col(24).parse().unwrap());
            assert!((cx - l.5 / l.0 as f64).abs() < 1e-9 && (cy - l.6 / l.0 as f64).abs() < 1e-9);
            let above = v.iter().filter(|x| **x > 0.55).count() as f64 / v.len() as f64;
            let got: f64 = col(13).parse().unwrap();
            assert!(
                (got - above).abs() < 1e-12,
                "above_fraction {got} vs {above}"
            );
        }
    }
}

// Otsu's level as stats.csv reports it maximises the between-class variance
// of the 256-bin histogram over [min, max] (Otsu 1979, eq. 18, from memory),
// searched here over every split by brute force; of equal ones the first.
#[test]
fn otsu_level_maximises_between_class_variance() {
    let (h, w) = (50, 60);
    let mut v = field(h, w, 21);
    // Two populations: a bright patch on the field.
    for r in 10..25 {
        for c in 30..50 {
            v[r * w + c] += 0.8;
        }
    }
    let (lo, hi) = v.iter().fold((f64::MAX, f64::MIN), |a, x| {
        (a.0.min(*x as f64), a.1.max(*x as f64))
    });
    let width = (hi - lo) / 256.0;
    let mut hist = [0f64; 256];
    for x in &v {
        hist[((((*x as f64) - lo) / width) as usize).min(255)] += 1.0;
    }
    let centre = |i: usize| lo + (i as f64 + 0.5) * width;
    let between = |k: usize| {
        let (w0, w1): (f64, f64) = (hist[..=k].iter().sum(), hist[k + 1..].iter().sum());
        let m0 = (0..=k).map(|i| hist[i] * centre(i)).sum::<f64>() / w0;
        let m1 = (k + 1..256).map(|i| hist[i] * centre(i)).sum::<f64>() / w1;
        w0 * w1 * (m0 - m1).powi(2)
    };
    // The first largest, as numpy.argmax takes it: empty bins between the two
    // populations give equal variances over the whole gap.
    let mut best = None;
    for k in 0..255 {
        if hist[..=k].iter().sum::<f64>() > 0.0 && hist[k + 1..].iter().sum::<f64>() > 0.0 {
            best = match best {
                Some(b) if between(b) >= between(k) => Some(b),
                _ => Some(k),
            };
        }
    }
    let best = best.unwrap();
    let t = tapmap::regions::otsu(&v, lo, hi);
    assert!((t - centre(best)).abs() < 1e-9, "{t} vs {}", centre(best));
}

// Thin edges of a smoothed step: one pixel wide along the step, nothing on
// the flat parts, none on the outer ring.
#[test]
fn thin_edges_of_a_disc_are_one_pixel_wide() {
    let (h, w) = (61, 61);
    let img: Vec<f32> = (0..h * w)
        .map(|i| {
            let (y, x) = ((i / w) as f64 - 30.0, (i % w) as f64 - 30.0);
            f32::from(u8::from((x * x + y * y).sqrt() < 18.0))
        })
        .collect();
    let spec = parse_recipe(
        r#"
[[stage]]
conv = "gaussian:sigma=1.5"
[[stage]]
conv = "sobel-x+sobel-y"
[[stage]]
thin = "canny"
low = 0.1
high = 0.3
keep = false
"#,
        Path::new("thin.recipe.toml"),
    )
    .unwrap();
    spec.validate().unwrap();
    let x = Array3::from_shape_vec((1, h, w), img).unwrap();
    let e = Plan::new(&spec.recipe, (1, h, w), Engine::Auto)
        .unwrap()
        .run(x.view())
        .unwrap();
    assert_eq!(e.dim(), (1, h, w));
    let on = |r: usize, c: usize| e[[0, r, c]] == 1.0;
    let mut count = 0;
    for r in 0..h {
        for c in 0..w {
            let v = e[[0, r, c]];
            assert!(v == 0.0 || v == 1.0);
            if on(r, c) {
                count += 1;
                let d = (((r as f64) - 30.0).powi(2) + ((c as f64) - 30.0).powi(2)).sqrt();
                assert!((d - 17.5).abs() < 1.6, "edge at {r},{c}, radius {d}");
            }
        }
    }
    // A closed ring about 2π·17.5 ≈ 110 pixels long, one pixel wide.
    assert!((90..140).contains(&count), "{count} edge pixels");
    // The row through the centre crosses the ring once on each side.
    let row: Vec<usize> = (0..w).filter(|&c| on(30, c)).collect();
    assert_eq!(row.len(), 2, "{row:?}");
}

// Recipe files: names, keep, errors that say what is there; split mode runs
// each entry once per channel.
#[test]
fn recipe_combines_name_and_check_their_maps() {
    let spec = parse_recipe(
        r#"
[[stage]]
conv = "edges"
[[stage]]
combine = "magnitude"
of = ["sobel-x", 1]
name = "strength"
[[stage]]
combine = ["max", "argmax"]
of = ["sobel-x", "sobel-y", "laplace-8"]
keep = false
"#,
        Path::new("c.recipe.toml"),
    )
    .unwrap();
    spec.validate().unwrap();
    let plan = Plan::new(&spec.recipe, (1, 9, 9), Engine::Auto).unwrap();
    assert_eq!(plan.channel_names(), ["max", "argmax"]);
    let bad = parse_recipe(
        "[[stage]]\nconv = \"edges\"\n[[stage]]\ncombine = \"orientation\"\nof = [\"sobel-x\", \"sobel-z\"]\n",
        Path::new("bad.recipe.toml"),
    )
    .unwrap();
    let e = bad.validate().unwrap_err().to_string();
    assert!(
        e.contains("sobel-z") && e.contains("sobel-x, sobel-y, laplace-8"),
        "{e}"
    );
    for (text, says) in [
        ("combine = \"orientation\"", "reads two maps"),
        ("combine = \"gradient\"\nname = \"g\"", "two maps"),
        (
            "combine = \"weighted\"\nweights = [1.0]",
            "1 weight(s) for 3 map(s)",
        ),
        (
            "combine = \"max\"\nslope = 0.1",
            "belong(s) to other stages",
        ),
        ("combine = \"argmax\"\ngives = \"angle\"", "declares none"),
        ("thin = \"canny\"\nlow = 0.5\nhigh = 0.1", "0 ≤ low ≤ high"),
        ("combine = \"hypot\"", "expected one of"),
    ] {
        let text = format!("[[stage]]\nconv = \"edges\"\n[[stage]]\n{text}\n");
        let e = parse_recipe(&text, Path::new("x.recipe.toml"))
            .and_then(|s| s.validate().map(|_| s))
            .unwrap_err()
            .to_string();
        assert!(e.contains(says), "{text}: {e}");
    }
    // Split: gradient per channel, names with the channel.
    let mut split = parse_recipe(
        "[[stage]]\nconv = \"sobel-x+sobel-y\"\n[[stage]]\ncombine = \"gradient\"\nkeep = false\n",
        Path::new("s.recipe.toml"),
    )
    .unwrap();
    split.input.color = tapmap::image_io::ColorMode::Split;
    split.validate().unwrap();
    let names: Vec<String> = ["r", "g", "b"].map(String::from).to_vec();
    let r = split.recipe_for(&names).unwrap();
    let plan = Plan::new(&r, (3, 8, 8), Engine::Auto).unwrap();
    assert_eq!(
        plan.channel_names(),
        [
            "magnitude@r",
            "orientation@r",
            "magnitude@g",
            "orientation@g",
            "magnitude@b",
            "orientation@b"
        ]
    );
}

// The flags: --combine gradient on the Sobel pair gives magnitude and
// orientation after the pair; --drop-sources only those; orientation views
// are cyclic; the manifest records the stage and the measures' options.
#[test]
fn combine_flags_write_maps_views_and_records() {
    let t = TempDir::new().unwrap();
    let (h, w) = (30, 40);
    let a = Array2::from_shape_vec((h, w), field(h, w, 4)).unwrap();
    let img = t.path().join("cap.npy");
    a.write_npy(std::fs::File::create(&img).unwrap()).unwrap();
    let out = t.path().join("o");
    let o = tapmap_command()
        .args([
            "apply",
            "-q",
            "--bank",
            "sobel-x+sobel-y",
            "--combine",
            "gradient",
        ])
        .args([
            "--drop-sources",
            "--threshold",
            "otsu",
            "--save",
            "all",
            "--out",
        ])
        .arg(&out)
        .arg(&img)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let maps =
        Array3::<f32>::read_npy(std::fs::File::open(out.join("maps/cap.npy")).unwrap()).unwrap();
    assert_eq!(maps.dim(), (2, h, w));
    assert!(out.join("views/cap/00-magnitude.png").is_file());
    assert!(out.join("views/cap/01-orientation.png").is_file());
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).unwrap()).unwrap();
    assert_eq!(m["threshold"], "otsu");
    assert_eq!(m["connectivity"], 8);
    let stages = m["recipe"]["stages"].as_array().unwrap();
    assert_eq!(stages[1]["stage"], "combine");
    assert_eq!(stages[1]["keep"], false);
    let views = m["inputs"][0]["views"].as_array().unwrap();
    assert_eq!(views[1]["scale"], "cyclic");
    assert_eq!(
        (views[1]["lo"].as_f64(), views[1]["hi"].as_f64()),
        (Some(-180.0), Some(180.0))
    );
    // Each map has its own Otsu level in the threshold column.
    let rows = stats_rows(&out);
    assert_eq!(rows.len(), 2);
    assert!(!rows[0][16].is_empty() && rows[0][16] != rows[1][16]);
    // Usage errors.
    for (args, says) in [
        (vec!["--drop-sources"], "goes with --combine"),
        (
            vec!["--combine", "orientation", "--bank", "edges"],
            "reads two maps",
        ),
        (
            vec!["--connectivity", "6", "--threshold", "1"],
            "give 8 or 4",
        ),
        (vec!["--threshold", "often"], "not a finite number"),
    ] {
        let mut cmd = tapmap_command();
        cmd.args(["apply", "-q"]);
        if !args.contains(&"--bank") {
            cmd.args(["--bank", "sobel-x+sobel-y"]);
        }
        let o = cmd
            .args(&args)
            .arg("--out")
            .arg(t.path().join("u"))
            .arg(&img)
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(2), "{args:?}");
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(e.contains(says), "{args:?}: {e}");
    }
}
