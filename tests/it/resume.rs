//! Runs that are killed or stopped half-way: `--resume` must finish with every
//! output byte-identical to an uninterrupted run (the manifest apart from its
//! times, command line and resumed count), and Ctrl-C must stop cleanly.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use image::{ImageBuffer, Luma};
use tempfile::TempDir;

const BIN: &str = env!("CARGO_BIN_EXE_tapmap");

/// `n` small grey images in two folders, deterministic content.
fn corpus(dir: &Path, n: u32) {
    for i in 0..n {
        let sub = if i % 2 == 0 { "s1" } else { "s2" };
        let p = dir.join(sub).join(format!("cap-{i:04}.png"));
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        ImageBuffer::from_fn(48, 32, |x, y| {
            Luma([((x * 7 + y * 13 + i * 29 + (x * y) % 17) % 251) as u8])
        })
        .save(&p)
        .unwrap();
    }
}

fn apply(out: &Path, input: &Path, extra: &[&str]) -> Command {
    let mut c = Command::new(BIN);
    c.args([
        "apply",
        "--bank",
        "edges",
        "--save",
        "maps,views,stats,manifest",
    ])
    .args(["--jobs", "2", "-q", "--out"])
    .arg(out)
    .args(extra)
    .arg(input)
    .stdout(Stdio::null())
    .stderr(Stdio::piped());
    c
}

/// Every file below `dir` with its bytes; the manifest with the fields that may
/// differ between an interrupted and an uninterrupted run removed.
fn tree(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut files = BTreeMap::new();
    for e in walkdir::WalkDir::new(dir) {
        let e = e.unwrap();
        if !e.file_type().is_file() {
            continue;
        }
        let rel = e.path().strip_prefix(dir).unwrap().to_path_buf();
        let bytes = crate::common::without_times(&rel, &std::fs::read(e.path()).unwrap());
        files.insert(rel, bytes);
    }
    files
}

fn same_tree(a: &Path, b: &Path, what: &str) {
    let (ta, tb) = (tree(a), tree(b));
    let names = |t: &BTreeMap<PathBuf, Vec<u8>>| t.keys().cloned().collect::<Vec<_>>();
    assert_eq!(names(&ta), names(&tb), "{what}: different files");
    for (k, v) in &ta {
        assert!(tb[k] == *v, "{what}: {} differs", k.display());
    }
}

/// A small deterministic generator for the kill points (no extra dependency).
struct Lcg(u64);
impl Lcg {
    fn unit(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

fn journal_lines(out: &Path) -> usize {
    std::fs::read_to_string(out.join("journal.jsonl"))
        .map(|t| t.lines().count())
        .unwrap_or(0)
}

#[test]
fn killed_runs_resume_to_identical_outputs() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("captures");
    corpus(&input, 300);
    let reference = t.path().join("reference");
    let clock = Instant::now();
    let r = apply(&reference, &input, &[]).output().unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let full = clock.elapsed().as_secs_f64();

    let mut rng = Lcg(20_261_202);
    let mut report = Vec::new();
    for trial in 0..4 {
        let out = t.path().join(format!("trial-{trial}"));
        // Two kills in a row (the second during the resumed run), then a resume
        // that runs to the end. Kill points are spread over the run's length.
        let mut kills = Vec::new();
        for round in 0..2 {
            let extra: &[&str] = if round == 0 { &[] } else { &["--resume"] };
            let mut child = apply(&out, &input, extra).spawn().unwrap();
            let at = full * (0.05 + 0.8 * rng.unit());
            std::thread::sleep(Duration::from_secs_f64(at));
            let _ = child.kill(); // SIGKILL
            let _ = child.wait();
            kills.push(format!("{at:.2}s/{} done", journal_lines(&out)));
        }
        let r = apply(&out, &input, &["--resume"]).output().unwrap();
        assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
        same_tree(&reference, &out, &format!("trial {trial}"));
        report.push(kills.join(", "));
    }
    eprintln!("kill points (run of {full:.2} s): {}", report.join(" | "));
}

#[test]
fn resume_redoes_what_changed_and_keeps_the_rest() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("captures");
    corpus(&input, 6);
    let out = t.path().join("out");
    assert!(apply(&out, &input, &[]).status().unwrap().success());
    let map = out.join("maps/s1/cap-0000.npy");
    let before = std::fs::metadata(&map).unwrap().modified().unwrap();
    // One input changes, one output goes missing: exactly those two are redone.
    ImageBuffer::from_fn(48, 32, |x, _| Luma([(x * 5) as u8]))
        .save(input.join("s2/cap-0003.png"))
        .unwrap();
    std::fs::remove_file(out.join("views/s1/cap-0002/00-sobel-x.png")).unwrap();
    let r = Command::new(BIN)
        .args(["apply", "--bank", "edges", "--resume", "--out"])
        .arg(&out)
        .arg(&input)
        .output()
        .unwrap();
    assert!(r.status.success());
    let err = String::from_utf8_lossy(&r.stderr);
    assert!(err.contains("4 taken from the earlier run"), "{err}");
    assert_eq!(
        std::fs::metadata(&map).unwrap().modified().unwrap(),
        before,
        "an unchanged input is not rewritten"
    );
    assert!(out.join("views/s1/cap-0002/00-sobel-x.png").is_file());
    // The result equals a fresh run over the changed inputs.
    let fresh = t.path().join("fresh");
    assert!(apply(&fresh, &input, &[]).status().unwrap().success());
    same_tree(&fresh, &out, "after changes");
    // Another recipe never reuses the journal.
    let r = Command::new(BIN)
        .args(["apply", "--bank", "smooth", "--resume", "--out"])
        .arg(&out)
        .arg(&input)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&r.stderr);
    assert!(err.contains("0 taken from the earlier run"), "{err}");
}

#[cfg(unix)]
#[test]
fn ctrl_c_stops_cleanly_and_resume_finishes() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("captures");
    corpus(&input, 300);
    let reference = t.path().join("reference");
    let clock = Instant::now();
    assert!(apply(&reference, &input, &[]).status().unwrap().success());
    let full = clock.elapsed().as_secs_f64();

    let out = t.path().join("out");
    let child = apply(&out, &input, &[]).spawn().unwrap();
    std::thread::sleep(Duration::from_secs_f64(full * 0.3));
    // SAFETY: sending a signal to our own child process.
    assert_eq!(unsafe { libc::kill(child.id() as i32, libc::SIGINT) }, 0);
    let r = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&r.stderr);
    if r.status.code() == Some(0) {
        eprintln!("the run finished before the signal came; nothing to check");
        return;
    }
    assert_eq!(r.status.code(), Some(130), "{err}");
    assert!(err.contains("stopped by signal 2"), "{err}");
    // Tables and manifest describe exactly what was done; no temporary files.
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("manifest.json")).unwrap()).unwrap();
    let done = m["summary"]["inputs"].as_u64().unwrap();
    assert_eq!(m["interrupted"]["signal"], 2);
    assert_eq!(m["interrupted"]["not_run"].as_u64().unwrap() + done, 300);
    let rows = std::fs::read_to_string(out.join("images.csv"))
        .unwrap()
        .lines()
        .count();
    assert_eq!(rows as u64, done + 1);
    for e in walkdir::WalkDir::new(&out) {
        let name = e.unwrap().file_name().to_string_lossy().into_owned();
        assert!(!name.ends_with(".part"), "temporary file {name} left");
    }
    // Every map listed is whole: it reads back.
    for entry in m["inputs"].as_array().unwrap() {
        for o in entry["outputs"].as_array().unwrap() {
            let p = out.join(o["path"].as_str().unwrap());
            assert_eq!(
                std::fs::metadata(&p).unwrap().len(),
                o["bytes"].as_u64().unwrap()
            );
        }
    }
    let r = apply(&out, &input, &["--resume"]).output().unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    same_tree(&reference, &out, "after Ctrl-C and --resume");
}
