//! `bank learn`: PCA against an independent eigen-solver, the grating's
//! quadrature pair, ZCA's whitened covariance, k-means on planted patterns,
//! determinism, and the learned bank reproducing its features under apply.

use std::path::{Path, PathBuf};

use ndarray::{Array1, Array2, Array3};
use ndarray_npy::ReadNpyExt;

use crate::common::{fold_index, tapmap_command};
use tapmap::border::PadMode;
use tapmap::kernel::bankfile::read_bank;
use tapmap::learn::rng::Rng;
use tapmap::learn::{CONTRAST_EPS, WHITEN_EPS};

/// A 16-bit grey PNG from values in [0, 1].
fn write_grey16(path: &Path, w: u32, h: u32, f: impl Fn(u32, u32) -> f64) {
    let img = image::ImageBuffer::<image::Luma<u16>, Vec<u16>>::from_fn(w, h, |x, y| {
        image::Luma([(f(x, y).clamp(0.0, 1.0) * 65535.0).round() as u16])
    });
    img.save(path).unwrap();
}

/// Pixels of a 16-bit grey PNG in [0, 1], row-major.
fn read_grey16(path: &Path) -> (Vec<f64>, usize, usize) {
    let img = image::open(path).unwrap().into_luma16();
    let (w, h) = img.dimensions();
    let v = img.pixels().map(|p| p.0[0] as f64 / 65535.0).collect();
    (v, h as usize, w as usize)
}

/// A textured capture: smooth blobs, a few edges and noise (seeded).
fn texture(seed: u64) -> impl Fn(u32, u32) -> f64 {
    let mut r = Rng::new(seed, 99);
    let noise: Vec<f64> = (0..96 * 96).map(|_| r.unit()).collect();
    move |x, y| {
        let (fx, fy) = (x as f64, y as f64);
        let smooth = 0.5 + 0.2 * (fx / 7.0).sin() * (fy / 11.0).cos();
        let edge = if fx + 0.5 * fy > 60.0 { 0.15 } else { 0.0 };
        smooth + edge + 0.08 * (noise[(y as usize % 96) * 96 + x as usize % 96] - 0.5)
    }
}

fn learn(dir: &Path, args: &[&str], inputs: &[&Path]) -> std::process::Output {
    let mut c = tapmap_command();
    c.arg("bank").arg("learn").args(args).arg("-q");
    c.args(inputs);
    c.current_dir(dir);
    c.output().unwrap()
}

fn ok(o: &std::process::Output) {
    assert!(
        o.status.success(),
        "bank learn failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

fn npy2(p: &Path) -> Array2<f32> {
    Array2::<f32>::read_npy(std::fs::File::open(p).unwrap()).unwrap()
}

/// Sample covariance (divided by n − 1) in f64, written out longhand.
fn covariance(x: &Array2<f32>) -> (Vec<f64>, Vec<f64>) {
    let (n, d) = x.dim();
    let mut mean = vec![0.0; d];
    for r in x.outer_iter() {
        for j in 0..d {
            mean[j] += r[j] as f64 / n as f64;
        }
    }
    let mut c = vec![0.0; d * d];
    for r in x.outer_iter() {
        for i in 0..d {
            let a = r[i] as f64 - mean[i];
            for j in 0..d {
                c[i * d + j] += a * (r[j] as f64 - mean[j]);
            }
        }
    }
    c.iter_mut().for_each(|v| *v /= (n - 1) as f64);
    (mean, c)
}

/// Eigenvalues (largest first) and eigenvectors of a symmetric matrix by the
/// cyclic Jacobi method (Golub & Van Loan, Matrix Computations, 4th ed.,
/// §8.5.2–8.5.3; from memory): rotations that zero one off-diagonal pair at
/// a time until the off-diagonal mass vanishes. Slow and plainly right.
fn jacobi(m: &[f64], d: usize) -> (Vec<f64>, Vec<Vec<f64>>) {
    let mut a = m.to_vec();
    let mut v: Vec<f64> = (0..d * d)
        .map(|i| if i / d == i % d { 1.0 } else { 0.0 })
        .collect();
    for _sweep in 0..100 {
        let off: f64 = (0..d)
            .flat_map(|i| (0..d).filter(move |j| *j != i).map(move |j| (i, j)))
            .map(|(i, j)| a[i * d + j].powi(2))
            .sum();
        if off < 1e-30 {
            break;
        }
        for p in 0..d {
            for q in p + 1..d {
                let apq = a[p * d + q];
                if apq.abs() < 1e-300 {
                    continue;
                }
                let theta = (a[q * d + q] - a[p * d + p]) / (2.0 * apq);
                let t = if theta >= 0.0 { 1.0 } else { -1.0 }
                    / (theta.abs() + (theta * theta + 1.0).sqrt());
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..d {
                    let (akp, akq) = (a[k * d + p], a[k * d + q]);
                    a[k * d + p] = c * akp - s * akq;
                    a[k * d + q] = s * akp + c * akq;
                }
                for k in 0..d {
                    let (apk, aqk) = (a[p * d + k], a[q * d + k]);
                    a[p * d + k] = c * apk - s * aqk;
                    a[q * d + k] = s * apk + c * aqk;
                }
                for k in 0..d {
                    let (vkp, vkq) = (v[k * d + p], v[k * d + q]);
                    v[k * d + p] = c * vkp - s * vkq;
                    v[k * d + q] = s * vkp + c * vkq;
                }
            }
        }
    }
    let mut order: Vec<usize> = (0..d).collect();
    order.sort_by(|&i, &j| a[j * d + j].total_cmp(&a[i * d + i]));
    let values = order.iter().map(|&i| a[i * d + i]).collect();
    let vectors = order
        .iter()
        .map(|&i| (0..d).map(|k| v[k * d + i]).collect())
        .collect();
    (values, vectors)
}

fn taps_of(bank: &tapmap::kernel::Bank) -> Vec<Vec<f64>> {
    bank.kernels
        .iter()
        .map(|k| k.planes.iter().flatten().copied().collect())
        .collect()
}

fn floats(t: &toml::Table, key: &str) -> Vec<f64> {
    t[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_float().unwrap())
        .collect()
}

fn textured_folder(dir: &Path, count: u64) -> PathBuf {
    let inputs = dir.join("captures");
    std::fs::create_dir_all(&inputs).unwrap();
    for i in 0..count {
        write_grey16(&inputs.join(format!("tile-{i}.png")), 90, 70, texture(i));
    }
    inputs
}

#[test]
fn pca_components_are_the_eigenvectors_of_the_kept_patches() {
    // Reference: the eigenvectors of the sample covariance of the very patches
    // tapmap kept (numpy.linalg.eigh of numpy.cov in the .ci/run check; here an
    // independent Jacobi solver), equal up to sign to 1e-4, and the explained
    // variances equal to the eigenvalues.
    let dir = tempfile::tempdir().unwrap();
    let inputs = textured_folder(dir.path(), 3);
    let o = learn(
        dir.path(),
        &[
            "--method",
            "pca",
            "--size",
            "5",
            "--count",
            "6",
            "--patches",
            "6000",
            "--keep-patches",
            "kept.npy",
            "-o",
            "pca.toml",
        ],
        &[&inputs],
    );
    ok(&o);
    let x = npy2(&dir.path().join("kept.npy"));
    assert_eq!(x.dim(), (6000, 25));
    let (_, c) = covariance(&x);
    let (values, vectors) = jacobi(&c, 25);
    let bank = read_bank(&dir.path().join("pca.toml")).unwrap();
    let prov = bank.provenance.as_ref().unwrap();
    let variance = floats(prov, "explained_variance");
    for (j, taps) in taps_of(&bank).iter().enumerate() {
        let dot: f64 = taps.iter().zip(&vectors[j]).map(|(a, b)| a * b).sum();
        let sign = dot.signum();
        let worst = taps
            .iter()
            .zip(&vectors[j])
            .map(|(a, b)| (a - sign * b).abs())
            .fold(0.0, f64::max);
        assert!(worst < 1e-4, "component {j}: differs by {worst}");
        assert!(
            (variance[j] - values[j]).abs() <= 1e-6 * values[0],
            "variance {j}: {} vs eigenvalue {}",
            variance[j],
            values[j]
        );
    }
    assert!(dir.path().join("pca.png").is_file(), "the sheet is drawn");
}

#[test]
fn pca_of_a_grating_gives_its_quadrature_pair() {
    // A stationary signal's covariance is shift-invariant, and its principal
    // components are its Fourier modes (Hyvärinen, Hurri & Hoyer, Natural Image
    // Statistics, Springer 2009, §5.6; from memory). A grating of one frequency
    // and orientation holds exactly one such pair: cos(ω·p) and sin(ω·p).
    let dir = tempfile::tempdir().unwrap();
    let (f, theta) = (1.0 / 6.0, 30f64.to_radians());
    let (wx, wy) = (
        2.0 * std::f64::consts::PI * f * theta.cos(),
        2.0 * std::f64::consts::PI * f * theta.sin(),
    );
    let img = dir.path().join("grating.png");
    write_grey16(&img, 160, 160, |x, y| {
        0.5 + 0.4 * (wx * x as f64 + wy * y as f64).cos()
    });
    let o = learn(
        dir.path(),
        &[
            "--method",
            "pca",
            "--size",
            "9",
            "--count",
            "3",
            "--patches",
            "8000",
            "-o",
            "g.toml",
        ],
        &[&img],
    );
    ok(&o);
    let bank = read_bank(&dir.path().join("g.toml")).unwrap();
    // The pair's span over a 9×9 patch, orthonormalised (Gram–Schmidt), with
    // the constant taken out (every normalised patch has mean 0).
    let wave = |g: fn(f64) -> f64| -> Vec<f64> {
        let v: Vec<f64> = (0..81)
            .map(|i| g(wx * (i % 9) as f64 + wy * (i / 9) as f64))
            .collect();
        let m = v.iter().sum::<f64>() / 81.0;
        v.iter().map(|a| a - m).collect()
    };
    let unit = |v: Vec<f64>| {
        let n = v.iter().map(|a| a * a).sum::<f64>().sqrt();
        v.into_iter().map(|a| a / n).collect::<Vec<_>>()
    };
    let e1 = unit(wave(f64::cos));
    let s = wave(f64::sin);
    let along: f64 = s.iter().zip(&e1).map(|(a, b)| a * b).sum();
    let e2 = unit(s.iter().zip(&e1).map(|(a, b)| a - along * b).collect());
    let taps = taps_of(&bank);
    for (j, t) in taps.iter().take(2).enumerate() {
        let p1: f64 = t.iter().zip(&e1).map(|(a, b)| a * b).sum();
        let p2: f64 = t.iter().zip(&e2).map(|(a, b)| a * b).sum();
        let captured = p1 * p1 + p2 * p2;
        assert!(
            captured > 0.999,
            "component {j}: only {captured} in the pair's span"
        );
    }
    let v = floats(bank.provenance.as_ref().unwrap(), "explained_ratio");
    assert!(v[0] + v[1] > 0.999, "the pair explains {:?}", v);
}

#[test]
fn zca_whitened_covariance_is_the_identity_to_the_epsilon_tolerance() {
    // W = U diag(1/sqrt(λ+ε)) Uᵀ makes the covariance U diag(λ/(λ+ε)) Uᵀ: the
    // identity on every direction but the constant one (which normalised
    // patches lack), short by ε/(λ+ε) (Coates & Ng 2012 §2; from memory).
    let dir = tempfile::tempdir().unwrap();
    let inputs = textured_folder(dir.path(), 2);
    let o = learn(
        dir.path(),
        &[
            "--method",
            "kmeans",
            "--size",
            "4",
            "--count",
            "4",
            "--patches",
            "5000",
            "--iterations",
            "3",
            "--keep-patches",
            "p.npy",
            "-o",
            "k.toml",
        ],
        &[&inputs],
    );
    ok(&o);
    let x = npy2(&dir.path().join("p.npy"));
    let d = x.ncols();
    let mean = Array1::<f64>::read_npy(std::fs::File::open(dir.path().join("p-mean.npy")).unwrap())
        .unwrap();
    let w =
        Array2::<f64>::read_npy(std::fs::File::open(dir.path().join("p-whitening.npy")).unwrap())
            .unwrap();
    let (m, c) = covariance(&x);
    for j in 0..d {
        assert!((m[j] - mean[j]).abs() < 1e-6, "kept mean {j}");
    }
    let (values, _) = jacobi(&c, d);
    let smallest = values[..d - 1]
        .iter()
        .copied()
        .fold(f64::INFINITY, f64::min);
    let bound = WHITEN_EPS / (smallest + WHITEN_EPS) + 1e-6;
    let z = x.mapv(|v| v as f64) - mean.view().insert_axis(ndarray::Axis(0));
    let z = z.dot(&w);
    let zc = z.t().dot(&z) / (x.nrows() - 1) as f64;
    let mut worst: f64 = 0.0;
    for i in 0..d {
        for j in 0..d {
            // The identity without the constant direction: I − 11ᵀ/d.
            let target = if i == j { 1.0 } else { 0.0 } - 1.0 / d as f64;
            worst = worst.max((zc[[i, j]] - target).abs());
        }
    }
    assert!(
        worst <= bound,
        "whitened covariance off by {worst}, bound {bound}"
    );
}

#[test]
fn spherical_kmeans_recovers_planted_patterns() {
    // Samples a·p_k + noise around four planted unit patterns: each pattern
    // has a centroid with |cos| > 0.95 (the chapter's assignment is by
    // |dᵀx|, so a pattern and its negative are one cluster).
    let d = 25;
    let mut r = Rng::new(5, 0);
    let normal = |r: &mut Rng| {
        let (u, v) = (r.unit().max(1e-12), r.unit());
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    };
    let planted: Vec<Vec<f64>> = (0..4)
        .map(|_| {
            let v: Vec<f64> = (0..d).map(|_| normal(&mut r)).collect();
            let n = v.iter().map(|a| a * a).sum::<f64>().sqrt();
            v.iter().map(|a| a / n).collect()
        })
        .collect();
    let mut data = Vec::new();
    for i in 0..4000 {
        let p = &planted[i % 4];
        let a = (0.5 + r.unit()) * if r.unit() < 0.5 { -1.0 } else { 1.0 };
        for t in p {
            data.push((a * t + 0.03 * normal(&mut r)) as f32);
        }
    }
    let s = tapmap::learn::kmeans::Settings {
        kind: tapmap::learn::kmeans::Kind::Spherical,
        count: 4,
        iterations: 30,
        tolerance: 1e-6,
        restarts: 3,
        seed: 2,
    };
    let c = tapmap::learn::kmeans::cluster(&data, d, &s, &|_, _, _| {}).unwrap();
    for (k, p) in planted.iter().enumerate() {
        let best = c
            .centroids
            .chunks(d)
            .map(|cv| {
                cv.iter()
                    .zip(p)
                    .map(|(a, b)| *a as f64 * b)
                    .sum::<f64>()
                    .abs()
            })
            .fold(0.0, f64::max);
        assert!(best > 0.95, "pattern {k}: best |cos| {best}");
    }
    let j = &c.objective;
    assert!(
        j.windows(2).all(|w| w[1] <= w[0] * (1.0 + 1e-9)),
        "the objective never rises: {j:?}"
    );
}

/// The bank file without the line that records the command line.
fn without_command_line(p: &Path) -> String {
    std::fs::read_to_string(p)
        .unwrap()
        .lines()
        .filter(|l| !l.starts_with("command_line = "))
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn the_bank_is_the_same_for_one_thread_or_two() {
    let dir = tempfile::tempdir().unwrap();
    let inputs = textured_folder(dir.path(), 4);
    for jobs in ["1", "2"] {
        let o = learn(
            dir.path(),
            &[
                "--method",
                "kmeans",
                "--size",
                "5",
                "--count",
                "8",
                "--patches",
                "3000",
                "--jobs",
                jobs,
                "--name",
                "k",
                "-o",
                &format!("k{jobs}.toml"),
            ],
            &[&inputs],
        );
        ok(&o);
    }
    let a = without_command_line(&dir.path().join("k1.toml"));
    let b = without_command_line(&dir.path().join("k2.toml"));
    let first = a.lines().zip(b.lines()).find(|(x, y)| x != y);
    assert!(
        a == b,
        "banks differ between --jobs 1 and --jobs 2: {first:?}"
    );
}

/// The learned features at window (y, x) of a padded plane: taps · x' + bias,
/// x' the window normalised (mean 0, divided by sqrt(var + ε)).
fn feature(plane: &[f64], w: usize, y: usize, x: usize, k: &tapmap::kernel::Kernel) -> f64 {
    let mut win = Vec::with_capacity(k.rows * k.cols);
    for r in 0..k.rows {
        for c in 0..k.cols {
            win.push(plane[(y + r) * w + x + c]);
        }
    }
    let n = win.len() as f64;
    let m = win.iter().sum::<f64>() / n;
    let v = win.iter().map(|a| (a - m).powi(2)).sum::<f64>() / n;
    let s = (v + CONTRAST_EPS).sqrt();
    win.iter()
        .zip(&k.planes[0])
        .map(|(a, t)| (a - m) / s * t)
        .sum::<f64>()
        + k.bias
}

#[test]
fn applying_a_learned_bank_gives_the_features_of_normalised_patches() {
    // Inside the image and at its borders (symmetric padding, the default for
    // learned banks): the map equals the feature of the normalised window.
    let dir = tempfile::tempdir().unwrap();
    let inputs = textured_folder(dir.path(), 2);
    let o = learn(
        dir.path(),
        &[
            "--method",
            "kmeans",
            "--size",
            "5",
            "--count",
            "4",
            "--patches",
            "4000",
            "--keep-patches",
            "p.npy",
            "-o",
            "k.toml",
        ],
        &[&inputs],
    );
    ok(&o);
    let bank = read_bank(&dir.path().join("k.toml")).unwrap();
    let mean = Array1::<f64>::read_npy(std::fs::File::open(dir.path().join("p-mean.npy")).unwrap())
        .unwrap();
    for k in &bank.kernels {
        let tm: f64 = k.planes[0]
            .iter()
            .zip(mean.iter())
            .map(|(a, b)| a * b)
            .sum();
        assert!((k.bias + tm).abs() < 1e-9, "{}: bias is −taps·μ", k.name);
    }
    // Under the default (symmetric) and under zero padding, where the window
    // variance is taken without the mean shift (the padded zeros stay zeros).
    for (mode, name) in [(PadMode::Symmetric, "symmetric"), (PadMode::Zero, "zero")] {
        let out = dir.path().join(format!("run-{name}"));
        let o = tapmap_command()
            .args(["apply", "--bank"])
            .arg(dir.path().join("k.toml"))
            .args(["--pad", name, "--save", "maps", "-q", "-o"])
            .arg(&out)
            .arg(inputs.join("tile-1.png"))
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let maps =
            Array3::<f32>::read_npy(std::fs::File::open(out.join("maps/tile-1.npy")).unwrap())
                .unwrap();
        let (img, h, w) = read_grey16(&inputs.join("tile-1.png"));
        assert_eq!(maps.dim(), (4, h, w));
        // Pad by 2 on every side, folding the way numpy.pad's mode reads.
        let pw = w + 4;
        let padded: Vec<f64> = (0..(h + 4) * pw)
            .map(|i| {
                let sy = fold_index(mode, (i / pw) as i64 - 2, h as i64);
                let sx = fold_index(mode, (i % pw) as i64 - 2, w as i64);
                match (sy, sx) {
                    (Some(sy), Some(sx)) => img[sy * w + sx],
                    _ => 0.0,
                }
            })
            .collect();
        let mut worst: f64 = 0.0;
        for (ki, k) in bank.kernels.iter().enumerate() {
            for &(y, x) in &[
                (0, 0),
                (0, w - 1),
                (h - 1, 3),
                (1, 1),
                (20, 33),
                (h / 2, w / 2),
                (h - 3, w - 2),
            ] {
                let want = feature(&padded, pw, y, x, k);
                let got = maps[[ki, y, x]] as f64;
                worst = worst.max((got - want).abs() / want.abs().max(1.0));
            }
        }
        assert!(
            worst < 1e-4,
            "{name}: maps differ from the features by {worst}"
        );
    }
}

#[test]
fn bad_and_small_inputs_are_named_and_the_rest_is_learned_from() {
    let dir = tempfile::tempdir().unwrap();
    let inputs = textured_folder(dir.path(), 2);
    std::fs::write(inputs.join("broken.png"), b"not a png at all").unwrap();
    write_grey16(&inputs.join("tiny.png"), 3, 3, |_, _| 0.5);
    let o = learn(
        dir.path(),
        &[
            "--method", "pca", "--size", "5", "--count", "2", "-o", "b.toml",
        ],
        &[&inputs],
    );
    assert_eq!(o.status.code(), Some(1), "some inputs failed");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("broken.png"), "{err}");
    assert!(
        err.contains("tiny.png") && err.contains("smaller than the 5×5 patch"),
        "{err}"
    );
    let bank = read_bank(&dir.path().join("b.toml")).unwrap();
    let p = bank.provenance.as_ref().unwrap();
    assert_eq!(p["failed"].as_integer(), Some(2));
    assert_eq!(p["images"].as_integer(), Some(2));
    // Refused before any work: an existing bank without --force, split colour.
    let o = learn(dir.path(), &["--size", "5", "-o", "b.toml"], &[&inputs]);
    assert!(!o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("--force"));
    let o = learn(
        dir.path(),
        &["--color", "split", "-o", "c.toml"],
        &[&inputs],
    );
    assert!(!o.status.success());
    assert!(!dir.path().join("c.toml").exists());
}
