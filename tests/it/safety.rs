//! Run safety: one regression test for each case an adversarial pass over the
//! tool found (numbered as in that pass), and for their siblings. Every bad
//! file is made by the test.

use std::collections::BTreeSet;
use std::ffi::OsStr;
use std::os::unix::ffi::OsStrExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

use image::{ImageBuffer, Luma};
use ndarray_npy::WriteNpyExt;
use tempfile::TempDir;

const BIN: &str = env!("CARGO_BIN_EXE_tapmap");

fn tapmap<I, S>(args: I) -> Output
where
    I: IntoIterator<Item = S>,
    S: AsRef<OsStr>,
{
    crate::common::tapmap_command().args(args).output().unwrap()
}

/// `tapmap apply --bank BANK -o OUT INPUT`.
fn apply_bank(bank: &str, out: &str, input: &str) -> Output {
    tapmap(["apply", "--bank", bank, "-o", out, input])
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Exit status, with the run's stderr in the message when it is not `want`.
fn expect(o: &Output, want: i32, what: &str) {
    assert_eq!(
        o.status.code(),
        Some(want),
        "{what}: exit {:?}, stderr:\n{}",
        o.status.code(),
        stderr(o)
    );
    assert!(!stderr(o).contains("panicked"), "{what}: panicked");
}

fn grey(p: &Path, w: u32, h: u32, seed: u32) -> PathBuf {
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    ImageBuffer::from_fn(w, h, |x, y| {
        Luma([((x * 11 + y * 5 + seed * 37) % 253) as u8])
    })
    .save(p)
    .unwrap();
    p.to_path_buf()
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The shipped edge bank with default options, for jobs made in the library.
fn edges_spec() -> tapmap::stage::RecipeSpec {
    tapmap::stage::RecipeSpec {
        input: tapmap::image_io::ReadOptions::default(),
        recipe: tapmap::stage::Recipe::single(
            tapmap::kernel::builtin::resolve_bank("edges").unwrap(),
            None,
            None,
        ),
        pads: Vec::new(),
    }
}

/// Every file below `dir`, relative, `/` separated.
fn files(dir: &Path) -> BTreeSet<String> {
    walkdir::WalkDir::new(dir)
        .into_iter()
        .map(|e| e.unwrap())
        .filter(|e| e.file_type().is_file())
        .map(|e| {
            e.path()
                .strip_prefix(dir)
                .unwrap()
                .to_string_lossy()
                .into_owned()
        })
        .collect()
}

fn csv_rows(path: &Path) -> Vec<csv::StringRecord> {
    csv::Reader::from_path(path)
        .unwrap()
        .records()
        .map(|r| r.unwrap())
        .collect()
}

fn column(path: &Path, name: &str) -> Vec<String> {
    let mut r = csv::Reader::from_path(path).unwrap();
    let i = r.headers().unwrap().iter().position(|h| h == name).unwrap();
    r.records().map(|x| x.unwrap()[i].to_string()).collect()
}

fn manifest(dir: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(dir.join("manifest.json")).unwrap()).unwrap()
}

/// The files a manifest lists: run-level files, and every input's outputs.
fn listed(m: &serde_json::Value) -> BTreeSet<String> {
    let mut out: BTreeSet<String> = m["files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["path"].as_str().unwrap().to_string())
        .collect();
    out.insert("manifest.json".into());
    for i in m["inputs"].as_array().unwrap() {
        for f in i["outputs"].as_array().unwrap() {
            out.insert(f["path"].as_str().unwrap().to_string());
        }
    }
    out
}

// 1. Shards that saw different input lists are refused by merge, naming the
// shard; so are shards of different folders.
#[test]
fn merge_refuses_shards_that_saw_other_inputs() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    for i in 0..6 {
        grey(&inp.join(format!("c{i}.png")), 12, 10, i);
    }
    let out = t.path().join("o");
    let shard = |k: &str, input: &Path| {
        let o = tapmap([
            "apply",
            "--bank",
            "edges",
            "-q",
            "--shard",
            k,
            "-o",
            s(&out),
            s(input),
        ]);
        expect(&o, 0, &format!("shard {k}"));
    };
    shard("1/3", &inp);
    shard("2/3", &inp);
    for i in 6..9 {
        grey(&inp.join(format!("c{i}.png")), 12, 10, i);
    }
    shard("3/3", &inp);
    let o = tapmap(["merge", s(&out)]);
    expect(&o, 2, "merge of shards over different lists");
    let e = stderr(&o);
    assert!(e.contains("shard 3/3 saw another input list"), "{e}");
    assert!(e.contains("9 inputs") && e.contains("6 inputs"), "{e}");
    assert!(!out.join("stats.csv").exists(), "nothing merged");

    // Same file names, another folder.
    let other = t.path().join("copy");
    std::fs::create_dir_all(&other).unwrap();
    for e in std::fs::read_dir(&inp).unwrap() {
        let e = e.unwrap();
        std::fs::copy(e.path(), other.join(e.file_name())).unwrap();
    }
    let out2 = t.path().join("o2");
    for (k, input) in [("1/2", &inp), ("2/2", &other)] {
        let o = tapmap([
            "apply",
            "--bank",
            "edges",
            "-q",
            "--shard",
            k,
            "-o",
            s(&out2),
            s(input),
        ]);
        expect(&o, 0, "shard");
    }
    let o = tapmap(["merge", s(&out2)]);
    expect(&o, 2, "merge of shards of two folders");
    assert!(
        stderr(&o).contains("saw another input list"),
        "{}",
        stderr(&o)
    );

    // The same list in every shard merges, and the merged manifest keeps it.
    let out3 = t.path().join("o3");
    for k in ["1/2", "2/2"] {
        let o = tapmap([
            "apply",
            "--bank",
            "edges",
            "-q",
            "--shard",
            k,
            "-o",
            s(&out3),
            s(&inp),
        ]);
        expect(&o, 0, "shard");
    }
    expect(&tapmap(["merge", s(&out3)]), 0, "merge");
    assert_eq!(manifest(&out3)["listed"]["count"], 9);
}

// 2. A run into a folder that holds an earlier run removes the files that run
// recorded, and only those; with --resume, what no result lists any more.
#[test]
fn a_reused_output_folder_holds_only_the_new_runs_files_and_the_users() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    grey(&inp.join("a.png"), 16, 12, 1);
    grey(&inp.join("deep/b.png"), 14, 10, 2);
    let out = t.path().join("o");
    expect(
        &tapmap([
            "apply",
            "--bank",
            "edges",
            "--save",
            "all",
            "-q",
            "-o",
            s(&out),
            s(&inp),
        ]),
        0,
        "first run",
    );
    // The user's own files, inside tapmap's folders and beside them.
    std::fs::write(out.join("notes.txt"), "shift B").unwrap();
    std::fs::write(out.join("maps/mine.npy"), "user data").unwrap();
    std::fs::remove_file(inp.join("deep/b.png")).unwrap();
    expect(
        &tapmap([
            "apply",
            "--bank",
            "identity",
            "--save",
            "maps,stats,manifest",
            "-q",
            "-o",
            s(&out),
            s(&inp),
        ]),
        0,
        "second run",
    );
    let mut want = listed(&manifest(&out));
    want.extend(["journal.jsonl", "notes.txt", "maps/mine.npy"].map(String::from));
    assert_eq!(
        files(&out),
        want,
        "the new run's files and the user's, nothing else"
    );
    for gone in ["tiff", "sheets", "views", "maps/deep"] {
        assert!(!out.join(gone).exists(), "{gone} left behind");
    }
    assert_eq!(
        std::fs::read_to_string(out.join("notes.txt")).unwrap(),
        "shift B"
    );

    // --resume: the deleted input's outputs go, the rest is taken over.
    let out = t.path().join("r");
    grey(&inp.join("deep/b.png"), 14, 10, 2);
    let run = |extra: &[&str]| {
        let mut a = vec!["apply", "--bank", "edges", "--save", "all", "-o", s(&out)];
        a.extend_from_slice(extra);
        a.push(s(&inp));
        tapmap(a)
    };
    expect(&run(&[]), 0, "full run");
    std::fs::remove_file(inp.join("deep/b.png")).unwrap();
    let o = run(&["--resume"]);
    expect(&o, 0, "resume");
    assert!(
        stderr(&o).contains("1 taken from the earlier run"),
        "{}",
        stderr(&o)
    );
    let mut want = listed(&manifest(&out));
    want.insert("journal.jsonl".into());
    assert_eq!(files(&out), want);
    assert!(!out.join("maps/deep").exists());
}

// 3. Nothing inside a run folder is ever input: named, globbed or walked;
// inputs inside --out are refused.
#[test]
fn outputs_of_a_run_are_never_read_as_input() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("line");
    grey(&inp.join("a.png"), 16, 12, 1);
    let out = inp.join("oo");
    expect(
        &tapmap(["apply", "--bank", "edges", "-q", "-o", s(&out), s(&inp)]),
        0,
        "first run",
    );
    let view = out.join("views/a/00-sobel-x.png");
    assert!(view.is_file());
    let o = apply_bank("edges", s(&t.path().join("x")), s(&view));
    expect(&o, 2, "a view named as input");
    assert!(
        stderr(&o).contains("the folder of a tapmap run"),
        "{}",
        stderr(&o)
    );
    assert!(!t.path().join("x").exists(), "nothing made");
    // Walked and globbed: the run folder is skipped.
    for arg in [s(&inp).to_string(), format!("{}/**/*.png", s(&inp))] {
        let o2 = t.path().join("o2");
        let o = tapmap(["apply", "--bank", "edges", "-q", "-o", s(&o2), &arg]);
        expect(&o, 0, &arg);
        assert_eq!(
            column(&o2.join("images.csv"), "path"),
            vec!["a.png"],
            "{arg}"
        );
        std::fs::remove_dir_all(&o2).unwrap();
    }
    // --out d d and --out a a/b.
    let d = t.path().join("d");
    grey(&d.join("b/c.png"), 9, 9, 3);
    for input in [d.clone(), d.join("b")] {
        let o = apply_bank("edges", s(&d), s(&input));
        expect(&o, 2, "input inside --out");
        assert!(
            stderr(&o).contains("lies inside the output folder"),
            "{}",
            stderr(&o)
        );
    }
}

// 4. Two runs into one --out: the second is refused while the first holds the
// lock; a lock file left by a dead process does not stop a run.
#[test]
fn one_run_at_a_time_writes_into_a_folder() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 12, 10, 1);
    let out = t.path().join("o");
    std::fs::create_dir_all(&out).unwrap();
    let held = tapmap::jobs::OutLock::take(&out).unwrap();
    let o = apply_bank("edges", s(&out), s(&a));
    expect(&o, 2, "while locked");
    let e = stderr(&o);
    assert!(
        e.contains("another tapmap") && e.contains(&format!("process {}", std::process::id())),
        "{e}"
    );
    assert!(!out.join("images.csv").exists());
    drop(held);
    assert!(
        !out.join(tapmap::jobs::LOCK_FILE).exists(),
        "removed on release"
    );
    // A stale lock file (its process gone, so nothing holds it).
    std::fs::write(out.join(tapmap::jobs::LOCK_FILE), "999999999").unwrap();
    expect(
        &tapmap(["apply", "--bank", "edges", "-q", "-o", s(&out), s(&a)]),
        0,
        "stale lock",
    );
    assert!(!out.join(tapmap::jobs::LOCK_FILE).exists());
    // The other jobs take the same lock.
    let held = tapmap::jobs::OutLock::take(&out).unwrap();
    let o = tapmap(["probe", "--bank", "edges", "-q", "-o", s(&out), s(&a)]);
    expect(&o, 2, "probe while locked");
    let o = tapmap(["borders", "--bank", "edges", "-q", "-o", s(&out), s(&a)]);
    expect(&o, 2, "borders while locked");
    drop(held);
}

// 5. --resume does not take over a map changed in place (same size), nor a
// journal entry whose values were edited.
#[test]
fn resume_redoes_outputs_changed_in_place_and_edited_entries() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    grey(&inp.join("a.png"), 16, 12, 1);
    grey(&inp.join("b.png"), 16, 12, 2);
    let out = t.path().join("o");
    let run = |extra: &str| {
        let mut a = vec!["apply", "--bank", "edges", "-o", s(&out), s(&inp)];
        if !extra.is_empty() {
            a.push(extra);
        }
        tapmap(a)
    };
    expect(&run(""), 0, "first run");
    let map = out.join("maps/a.npy");
    let good = std::fs::read(&map).unwrap();
    let stats = std::fs::read(out.join("stats.csv")).unwrap();
    let mut bad = good.clone();
    let n = bad.len();
    bad[n - 2] ^= 0x40;
    std::thread::sleep(std::time::Duration::from_millis(20));
    std::fs::write(&map, &bad).unwrap();
    assert_eq!(std::fs::metadata(&map).unwrap().len(), good.len() as u64);
    let o = run("--resume");
    expect(&o, 0, "resume");
    assert!(
        stderr(&o).contains("1 taken from the earlier run"),
        "{}",
        stderr(&o)
    );
    assert_eq!(
        std::fs::read(&map).unwrap(),
        good,
        "the changed map was made again"
    );

    // An edited statistic in the journal.
    let journal = out.join("journal.jsonl");
    let text = std::fs::read_to_string(&journal).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let mut v: serde_json::Value = serde_json::from_str(&lines[1]).unwrap();
    v["done"]["stats"][0]["stats"]["max"] = serde_json::json!(12345.0);
    lines[1] = v.to_string();
    std::fs::write(&journal, lines.join("\n") + "\n").unwrap();
    let o = run("--resume");
    expect(&o, 0, "resume after the edit");
    assert!(
        stderr(&o).contains("1 taken from the earlier run"),
        "{}",
        stderr(&o)
    );
    assert_eq!(std::fs::read(out.join("stats.csv")).unwrap(), stats);
}

// 6. float64 input is rounded to float32, and the tables say so.
#[test]
fn float64_input_is_reported_as_64_bit_and_converted() {
    let t = TempDir::new().unwrap();
    let a = ndarray::Array2::<f64>::from_shape_fn((6, 7), |(y, x)| 1.0 + (y * 7 + x) as f64 * 1e-9);
    let p = t.path().join("fine.npy");
    a.write_npy(std::fs::File::create(&p).unwrap()).unwrap();
    let out = t.path().join("o");
    expect(
        &tapmap(["apply", "--bank", "identity", "-q", "-o", s(&out), s(&p)]),
        0,
        "run",
    );
    let images = out.join("images.csv");
    assert_eq!(column(&images, "bit_depth"), vec!["64"]);
    assert_eq!(column(&images, "sample"), vec!["float"]);
    assert_eq!(column(&images, "converted"), vec!["float64 to float32"]);
    let maps: ndarray::Array3<f32> = ndarray_npy::read_npy(out.join("maps/fine.npy")).unwrap();
    for ((y, x), v) in a.indexed_iter() {
        assert_eq!(maps[[0, y, x]], *v as f32, "rounded to nearest (IEEE 754)");
    }
}

// 7. Taps float32 cannot hold are refused; sums that overflow fail the image.
#[test]
fn overflowing_taps_and_sums_are_caught() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 12, 10, 1);
    let huge = t.path().join("huge.toml");
    std::fs::write(
        &huge,
        "name = \"huge\"\n[[kernel]]\nname = \"k\"\ntaps = [[1e300]]\n",
    )
    .unwrap();
    let o = apply_bank(s(&huge), s(&t.path().join("x")), s(&a));
    expect(&o, 2, "1e300 tap");
    assert!(stderr(&o).contains("huge.toml"), "{}", stderr(&o));
    // Nine taps of 3e38 each fit float32, but no response could.
    let big = t.path().join("big.toml");
    std::fs::write(
        &big,
        "name = \"big\"\n[[kernel]]\nname = \"k\"\ntaps = [[3e38, 3e38, 3e38], [3e38, 3e38, 3e38], [3e38, 3e38, 3e38]]\n",
    )
    .unwrap();
    let o = apply_bank(s(&big), s(&t.path().join("x")), s(&a));
    expect(&o, 2, "taps whose sum overflows");
    assert!(
        stderr(&o).contains("larger than float32 can hold"),
        "{}",
        stderr(&o)
    );
    // Taps that are fine, on float input near float32's largest value: the
    // sums overflow, and the image fails instead of writing infinities.
    let v = ndarray::Array2::<f32>::from_elem((6, 6), 3e38);
    let w = t.path().join("white.npy");
    v.write_npy(std::fs::File::create(&w).unwrap()).unwrap();
    let out = t.path().join("o");
    let pair = t.path().join("pair.toml");
    std::fs::write(
        &pair,
        "name = \"pair\"\n[[kernel]]\nname = \"sum2\"\ntaps = [[1, 1]]\n",
    )
    .unwrap();
    let o = apply_bank(s(&pair), s(&out), s(&w));
    expect(&o, 1, "overflowing sums");
    assert!(stderr(&o).contains("not finite"), "{}", stderr(&o));
    assert_eq!(column(&out.join("images.csv"), "status"), vec!["failed"]);
    assert!(!out.join("maps/white.npy").exists());
}

// 8. A failure to write the tables at the end is a run failure (exit 1) that
// keeps every image's files and says how to finish.
#[test]
fn a_table_write_failure_keeps_the_results_and_resume_finishes() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    grey(&inp.join("a.png"), 12, 10, 1);
    let out = t.path().join("o");
    // A folder where stats.csv goes: the rename onto it fails, as a full disk would.
    std::fs::create_dir_all(out.join("stats.csv")).unwrap();
    let o = apply_bank("edges", s(&out), s(&inp));
    expect(&o, 1, "tables not written");
    assert!(stderr(&o).contains("--resume"), "{}", stderr(&o));
    assert!(out.join("maps/a.npy").is_file());
    assert!(out.join("journal.jsonl").is_file());
    std::fs::remove_dir(out.join("stats.csv")).unwrap();
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--resume",
        "-o",
        s(&out),
        s(&inp),
    ]);
    expect(&o, 0, "resume");
    assert_eq!(csv_rows(&out.join("stats.csv")).len(), 3);
    assert!(out.join("manifest.json").is_file());
}

// 9. Option values that are not finite numbers are refused everywhere.
#[test]
fn non_finite_option_values_are_refused() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 12, 10, 1);
    let out = t.path().join("o");
    for v in ["nan", "inf", "-inf", "1e39"] {
        let o = tapmap([
            "apply",
            "--bank",
            "edges",
            "--threshold",
            v,
            "-o",
            s(&out),
            s(&a),
        ]);
        expect(&o, 2, &format!("--threshold {v}"));
        assert!(stderr(&o).contains("not a finite number"), "{}", stderr(&o));
        let o = tapmap([
            "borders",
            "--bank",
            "edges",
            "--tolerance",
            v,
            "-o",
            s(&out),
            s(&a),
        ]);
        expect(&o, 2, &format!("--tolerance {v}"));
    }
    let o = tapmap([
        "borders",
        "--bank",
        "edges",
        "--tolerance",
        "-1",
        "-o",
        s(&out),
        s(&a),
    ]);
    expect(&o, 2, "--tolerance -1");
    assert!(!out.exists());
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--view-range",
        "0,nan",
        "-o",
        s(&out),
        s(&a),
    ]);
    expect(&o, 2, "--view-range 0,nan");
    // The library refuses it too.
    let mut job = tapmap::jobs::ApplyJob::new(edges_spec(), &out, vec![a.clone()]);
    job.threshold = Some(tapmap::regions::Threshold::Value(f32::NAN));
    assert!(job.check().is_err());
}

// 10. Probe memory is bounded by the hits that can exist, and its pictures
// are paged.
#[test]
fn probe_with_a_huge_top_stays_bounded_and_pages_its_pictures() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    grey(&inp.join("a.png"), 40, 32, 1);
    grey(&inp.join("b.png"), 40, 32, 2);
    let out = t.path().join("o");
    let o = tapmap([
        "probe",
        "--bank",
        "sobel-x",
        "--top",
        "1000000000",
        "-q",
        "-o",
        s(&out),
        s(&inp),
    ]);
    expect(&o, 0, "--top 1e9");
    let hits = csv_rows(&out.join("probe.csv")).len();
    assert!(hits > 64 && hits < 40 * 32 * 2, "{hits} hits");
    let pages: Vec<String> = files(&out.join("kernels")).into_iter().collect();
    assert_eq!(pages.len(), hits.div_ceil(64), "{pages:?}");
    assert!(
        pages.contains(&"00-sobel-x-p2.png".to_string()),
        "{pages:?}"
    );
    for p in files(&out) {
        if p.ends_with(".png") {
            let (w, h) = image::image_dimensions(out.join(&p)).unwrap();
            assert!(w <= 4096 && h <= 4096, "{p} is {w}×{h}");
        }
    }
    // --max-memory is honoured, with the estimate in the message.
    let big = grey(&t.path().join("big/c.png"), 512, 512, 3);
    let o = tapmap([
        "probe",
        "--bank",
        "edges",
        "--max-memory",
        "3M",
        "-o",
        s(&t.path().join("p")),
        s(&big),
    ]);
    expect(&o, 1, "probe over --max-memory");
    assert!(
        stderr(&o).contains("needs about") && stderr(&o).contains("to probe"),
        "{}",
        stderr(&o)
    );
}

// 11. borders honours --max-memory before the work; the decode estimate is
// near the real need (file, decoded samples, one f32 plane for luma), not 4×.
#[test]
fn borders_and_decoding_honour_max_memory_with_honest_estimates() {
    let t = TempDir::new().unwrap();
    let big = grey(&t.path().join("c.png"), 600, 600, 3);
    let o = tapmap([
        "borders",
        "--bank",
        "edges",
        "--max-memory",
        "3M",
        "-o",
        s(&t.path().join("b")),
        s(&big),
    ]);
    expect(&o, 1, "borders over --max-memory");
    assert!(stderr(&o).contains("to study"), "{}", stderr(&o));
    let o = tapmap([
        "borders",
        "--bank",
        "edges",
        "--max-memory",
        "64M",
        "-q",
        "-o",
        s(&t.path().join("b2")),
        s(&big),
    ]);
    expect(&o, 0, "borders within --max-memory");
    // 1000² 8-bit grey: decoding holds about 5 MB (1 MB of samples, 4 MB of
    // f32), so 8M passes decoding and fails only at the recipe (which holds
    // more); the old estimate (17 bytes a pixel) failed it at decoding.
    let p = grey(&t.path().join("m.png"), 1000, 1000, 4);
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--max-memory",
        "8M",
        "-o",
        s(&t.path().join("m")),
        s(&p),
    ]);
    expect(&o, 1, "apply over --max-memory");
    assert!(stderr(&o).contains("to run the recipe"), "{}", stderr(&o));
}

// 12. A --jobs far above the cores is lowered, with a warning.
#[test]
fn too_many_jobs_are_clamped_with_a_warning() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 12, 10, 1);
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--jobs",
        "100000",
        "-o",
        s(&t.path().join("o")),
        s(&a),
    ]);
    expect(&o, 0, "--jobs 100000");
    assert!(
        stderr(&o).contains("--jobs 100000 is more than 8 per core"),
        "{}",
        stderr(&o)
    );
    let mut job = tapmap::jobs::ApplyJob::new(edges_spec(), t.path().join("lib"), vec![a]);
    job.jobs = 100_000;
    let e = tapmap::jobs::run_apply(&job, &tapmap::jobs::Quiet).unwrap_err();
    assert!(e.to_string().contains("threads asked for"), "{e}");
}

// 13. A closed or full stdout or stderr never panics; results are written.
#[test]
fn closed_or_full_output_streams_end_quietly_with_a_meaningful_status() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 24, 20, 1);
    let full = || {
        std::fs::OpenOptions::new()
            .write(true)
            .open("/dev/full")
            .unwrap()
    };
    let run = |args: &[&str], out: Stdio, err: Stdio| {
        Command::new(BIN)
            .args(args)
            .stdout(out)
            .stderr(err)
            .output()
            .unwrap()
    };
    let o = run(&["bank", "list"], full().into(), Stdio::piped());
    expect(&o, 1, "bank list > /dev/full");
    assert!(
        stderr(&o).contains("could not write to standard output"),
        "{}",
        stderr(&o)
    );
    let b = t.path().join("b");
    let o = run(
        &["borders", "--bank", "edges", "-o", s(&b), s(&a)],
        full().into(),
        Stdio::piped(),
    );
    expect(&o, 1, "borders > /dev/full");
    assert!(b.join("borders.csv").is_file() && b.join("summary.csv").is_file());
    let ap = t.path().join("ap");
    let o = run(
        &["apply", "--bank", "edges", "-o", s(&ap), s(&a)],
        Stdio::piped(),
        full().into(),
    );
    assert_eq!(o.status.code(), Some(0), "apply 2>/dev/full");
    assert!(ap.join("maps/a.npy").is_file() && ap.join("manifest.json").is_file());
    // A pipe whose reader has gone (`| head -1`).
    let mut child = Command::new(BIN)
        .args(["reckon", "--bank", "texture", "--size", "4000x3000"])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let o = child.wait_with_output().unwrap();
    expect(&o, 0, "plan | (closed)");
    assert!(stderr(&o).is_empty(), "{}", stderr(&o));
}

// 14. Arguments and file names that are not UTF-8 work, are recorded without
// loss, and two such names are never taken for each other.
#[test]
fn non_utf8_names_are_kept_apart_and_recorded_without_loss() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join(OsStr::from_bytes(b"in\xfe"));
    grey(&inp.join(OsStr::from_bytes(b"a\xe9.png")), 12, 10, 1);
    grey(&inp.join(OsStr::from_bytes(b"a\xe8.png")), 12, 10, 2);
    let out = t.path().join(OsStr::from_bytes(b"out\xff"));
    let args = |extra: &[&OsStr]| {
        let mut v: Vec<&OsStr> = ["apply", "--bank", "edges", "-o"].map(OsStr::new).to_vec();
        v.push(out.as_os_str());
        v.push(inp.as_os_str());
        v.extend_from_slice(extra);
        tapmap(v)
    };
    expect(&args(&[]), 0, "non-UTF-8 names");
    let mut paths = column(&out.join("images.csv"), "path");
    paths.sort();
    assert_eq!(paths, vec!["a\\xe8.png", "a\\xe9.png"]);
    assert!(out.join(OsStr::from_bytes(b"maps/a\xe9.npy")).is_file());
    let m = manifest(&out);
    assert!(
        m["command_line"].to_string().contains("in\\\\xfe"),
        "{}",
        m["command_line"]
    );
    // Resume takes each over as itself.
    let o = args(&[OsStr::new("--resume")]);
    expect(&o, 0, "resume");
    assert!(
        stderr(&o).contains("2 taken from the earlier run"),
        "{}",
        stderr(&o)
    );
}

// 15. A missing input: exit 2, plain words, nothing made.
#[test]
fn a_missing_input_is_a_usage_error_before_anything_is_made() {
    let t = TempDir::new().unwrap();
    let out = t.path().join("o");
    let o = apply_bank("edges", s(&out), s(&t.path().join("gone.png")));
    expect(&o, 2, "missing input");
    assert!(
        stderr(&o).contains("no such file or folder"),
        "{}",
        stderr(&o)
    );
    assert!(!out.exists());
}

// 16. A recipe whose later conv needs maps the earlier cannot give is refused
// before any image (split colour mode, where the count is per channel).
#[test]
fn a_recipe_that_cannot_chain_is_refused_before_any_image() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 12, 10, 1);
    let two = t.path().join("two.toml");
    std::fs::write(&two, "name = \"two\"\n[[kernel]]\nname = \"p\"\ntaps = [[1]]\n[[kernel]]\nname = \"q\"\ntaps = [[2]]\n").unwrap();
    let three = t.path().join("three.toml");
    std::fs::write(
        &three,
        "name = \"three\"\n[[kernel]]\nname = \"r\"\nplanes = [[[1]], [[1]], [[1]]]\n",
    )
    .unwrap();
    let recipe = t.path().join("r.recipe.toml");
    std::fs::write(
        &recipe,
        format!(
            "[input]\ncolor = \"split\"\n[[stage]]\nconv = \"{}\"\n[[stage]]\nconv = \"{}\"\n",
            s(&two),
            s(&three)
        ),
    )
    .unwrap();
    let out = t.path().join("o");
    let o = tapmap(["apply", "--recipe", s(&recipe), "-o", s(&out), s(&a)]);
    expect(&o, 2, "unchainable recipe");
    assert!(
        stderr(&o).contains("multiple of 2 planes"),
        "{}",
        stderr(&o)
    );
    assert!(!out.exists());
}

/// A `.npy` of float32 `h × w` zeros with a header text of our choosing.
fn npy_with_header(dict: &str, data_bytes: usize) -> Vec<u8> {
    let mut header = dict.to_string();
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut b = b"\x93NUMPY\x01\x00".to_vec();
    b.extend((header.len() as u16).to_le_bytes());
    b.extend(header.as_bytes());
    b.extend(vec![0u8; data_bytes]);
    b
}

// 17. A .npy header without its closing brace, or with bytes after the data,
// is refused, for inputs and banks alike.
#[test]
fn damaged_npy_headers_and_trailing_bytes_are_refused_for_inputs_and_banks() {
    let t = TempDir::new().unwrap();
    let open = npy_with_header(
        "{'descr': '<f4', 'fortran_order': False, 'shape': (3, 3)",
        36,
    );
    let trailing = npy_with_header(
        "{'descr': '<f4', 'fortran_order': False, 'shape': (3, 3), }",
        40,
    );
    for (name, bytes, needle) in [
        ("open.npy", &open, "header"),
        ("trailing.npy", &trailing, "bytes after its data"),
    ] {
        let p = t.path().join(name);
        std::fs::write(&p, bytes).unwrap();
        let out = t.path().join(format!("o-{name}"));
        let o = apply_bank("identity", s(&out), s(&p));
        expect(&o, 1, name);
        assert!(stderr(&o).contains(needle), "{name}: {}", stderr(&o));
        // As a bank (a 3×3 kernel).
        let o = tapmap(["bank", "show", s(&p)]);
        expect(&o, 2, &format!("bank {name}"));
        assert!(stderr(&o).contains(needle), "bank {name}: {}", stderr(&o));
    }
}

// 18. Name collisions listed at once; a dangling-link --out; unread TIFF
// layouts named; control characters escaped in CSVs; no rate for a run that
// did no work.
#[test]
fn collisions_links_tiff_layouts_control_characters_and_idle_rates() {
    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    for n in ["a.png", "a.bmp", "a.tif", "b.png", "b.bmp", "c.png"] {
        grey(&inp.join(n), 8, 8, 1);
    }
    let o = apply_bank("edges", s(&t.path().join("o")), s(&inp));
    expect(&o, 2, "collisions");
    let e = stderr(&o);
    assert!(
        e.contains("2 output name(s)") && e.contains("a (from") && e.contains("b (from"),
        "{e}"
    );
    assert!(e.contains("a.tif"), "{e}");

    let link = t.path().join("link");
    std::os::unix::fs::symlink(t.path().join("nowhere"), &link).unwrap();
    let c = inp.join("c.png");
    let o = apply_bank("edges", s(&link), s(&c));
    expect(&o, 2, "dangling --out");
    assert!(
        stderr(&o).contains("symbolic link to") && stderr(&o).contains("does not exist"),
        "{}",
        stderr(&o)
    );

    let tif = t.path().join("signed.tif");
    {
        let f = std::fs::File::create(&tif).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(f).unwrap();
        enc.write_image::<tiff::encoder::colortype::GrayI16>(4, 3, &[-3i16; 12])
            .unwrap();
    }
    let o = apply_bank("edges", s(&t.path().join("ti")), s(&tif));
    expect(&o, 1, "int16 TIFF");
    assert!(
        stderr(&o).contains("16-bit signed integer"),
        "{}",
        stderr(&o)
    );

    let bank = t.path().join("bell.toml");
    std::fs::write(
        &bank,
        "name = \"bell\"\n[[kernel]]\nname = \"ring\\u0007\\ttab\"\ntaps = [[1]]\n",
    )
    .unwrap();
    let out = t.path().join("cc");
    let o = tapmap(["apply", "--bank", s(&bank), "-q", "-o", s(&out), s(&c)]);
    expect(&o, 0, "control characters in a kernel name");
    assert_eq!(
        column(&out.join("stats.csv"), "name"),
        vec!["ring\\x07\\x09tab"]
    );

    let o = tapmap([
        "apply",
        "--bank",
        s(&bank),
        "--resume",
        "-o",
        s(&out),
        s(&c),
    ]);
    expect(&o, 0, "fully resumed");
    assert!(!stderr(&o).contains("images/s"), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("1 taken from the earlier run"),
        "{}",
        stderr(&o)
    );
}

// Also found by reading the tool as a new user.
#[test]
fn shipped_banks_join_and_quiet_acceptances_now_speak() {
    let t = TempDir::new().unwrap();
    let a = grey(&t.path().join("a.png"), 16, 12, 1);
    // Shipped banks join with '+'; Gaussians give one map under either op.
    let o = tapmap(["bank", "show", "edges+smooth"]);
    expect(&o, 0, "edges+smooth");
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("sobel-x") && text.contains("op correlate"),
        "{text}"
    );
    let o = tapmap(["bank", "show", "edges+edges"]);
    expect(&o, 2, "a part twice");
    // --view-depth 16 with signed maps.
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--view-depth",
        "16",
        "-o",
        s(&t.path().join("v")),
        s(&a),
    ]);
    expect(&o, 0, "--view-depth 16");
    assert!(
        stderr(&o).contains("warning: --view-depth 16") && stderr(&o).contains("sobel-x"),
        "{}",
        stderr(&o)
    );
    // --white beyond 16 bits.
    let o = tapmap([
        "apply",
        "--bank",
        "edges",
        "--white",
        "70000",
        "-o",
        s(&t.path().join("w")),
        s(&a),
    ]);
    expect(&o, 2, "--white 70000");
    // bank draw writes PNG only.
    let o = tapmap(["bank", "draw", "edges", "-o", s(&t.path().join("x.jpg"))]);
    expect(&o, 2, "bank draw -o x.jpg");
    assert!(!t.path().join("x.jpg").exists());
    // bank make does not overwrite without --force.
    let bank = t.path().join("mine.toml");
    std::fs::write(&bank, "# someone's work\n").unwrap();
    let o = tapmap(["bank", "make", "sobel-x", "-o", s(&bank)]);
    expect(&o, 2, "bank make over a file");
    assert_eq!(
        std::fs::read_to_string(&bank).unwrap(),
        "# someone's work\n"
    );
    expect(
        &tapmap(["bank", "make", "sobel-x", "--force", "-o", s(&bank)]),
        0,
        "--force",
    );
    // Repeated parameters.
    let o = tapmap([
        "bank",
        "make",
        "gaussian",
        "sigma=1",
        "sigma=2",
        "-o",
        s(&t.path().join("g.toml")),
    ]);
    expect(&o, 2, "sigma twice");
    assert!(stderr(&o).contains("twice"), "{}", stderr(&o));
    let o = tapmap(["bank", "show", "gaussian:sigma=1,sigma=2"]);
    expect(&o, 2, "sigma twice in one spec");
    // hwio that gives non-square kernels from a square-looking file.
    let w =
        ndarray::Array4::<f32>::from_shape_fn((4, 3, 3, 3), |(o, i, y, x)| (o + i + y + x) as f32);
    let npy = t.path().join("w.npy");
    w.write_npy(std::fs::File::create(&npy).unwrap()).unwrap();
    let o = tapmap([
        "bank",
        "import",
        s(&npy),
        "--layout",
        "hwio",
        "-o",
        s(&t.path().join("w.toml")),
    ]);
    expect(&o, 0, "hwio import");
    assert!(
        stderr(&o).contains("warning") && stderr(&o).contains("--layout oihw"),
        "{}",
        stderr(&o)
    );
}
