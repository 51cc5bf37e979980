//! `apply --follow` against a writer that drops captures into nested folders
//! while it runs: plain writes, slow writes in chunks, renames from a
//! temporary name, corrupt files and one file rewritten after its result. At
//! the end the outputs must be byte-identical to a batch run over the final
//! folder (maps, views, stats.csv, images.csv; the manifest's inputs), also
//! when the follower is killed with SIGKILL at random moments and restarted:
//! nothing missing, nothing twice.

#![cfg(unix)]

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Child, Stdio};
use std::time::{Duration, Instant};

use image::{ImageBuffer, Luma};
use tempfile::TempDir;

/// The same small deterministic generator as the resume tests use.
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

/// The PNG bytes of capture `i` (16-bit, 12 bits used, as a line camera
/// writes), `variant` changing its content.
fn capture(i: u32, variant: u32) -> Vec<u8> {
    let img = ImageBuffer::from_fn(40, 30, |x, y| {
        Luma([((x * 97 + y * 61 + i * 389 + variant * 1013 + (x * y) % 23) % 4096) as u16])
    });
    let mut bytes = Vec::new();
    img.write_to(
        &mut std::io::Cursor::new(&mut bytes),
        image::ImageFormat::Png,
    )
    .unwrap();
    bytes
}

/// Where capture `i` goes, below the followed folder.
fn place(i: u32) -> PathBuf {
    let station = ["s1-glaze", "s2-edge/left", "s2-edge/right", "s3-final"][(i % 4) as usize];
    PathBuf::from(format!("{station}/shift-{}/cap-{i:04}.png", i / 50))
}

/// Writes capture `i` into `root` in one of the ways a line writes files.
fn drop_one(root: &Path, i: u32) {
    let path = root.join(place(i));
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let bytes = capture(i, 0);
    match i % 10 {
        // Corrupt: a PNG cut short, as a camera that lost its link leaves it.
        7 if i % 20 == 7 => std::fs::write(&path, &bytes[..bytes.len() / 3]).unwrap(),
        // Slowly, in chunks within one open file: never read half-written.
        3 => {
            let mut f = std::fs::File::create(&path).unwrap();
            for chunk in bytes.chunks(bytes.len() / 4 + 1) {
                f.write_all(chunk).unwrap();
                f.flush().unwrap();
                std::thread::sleep(Duration::from_millis(120));
            }
        }
        // Under a temporary name, then renamed into place.
        5 => {
            let part = path.with_extension("png.part");
            std::fs::write(&part, &bytes).unwrap();
            std::fs::rename(&part, &path).unwrap();
        }
        _ => std::fs::write(&path, &bytes).unwrap(),
    }
}

/// Drops `n` captures at one every `every` (slow ones on their own threads,
/// so the rate stays steady).
fn writer(root: PathBuf, n: u32, every: Duration) -> std::thread::JoinHandle<()> {
    std::thread::spawn(move || {
        let start = Instant::now();
        let mut slow = Vec::new();
        for i in 0..n {
            let due = start + every * i;
            if let Some(wait) = due.checked_duration_since(Instant::now()) {
                std::thread::sleep(wait);
            }
            if i % 10 == 3 {
                let r = root.clone();
                slow.push(std::thread::spawn(move || drop_one(&r, i)));
            } else {
                drop_one(&root, i);
            }
        }
        slow.into_iter().for_each(|h| h.join().unwrap());
    })
}

fn follower(out: &Path, input: &Path) -> Child {
    crate::common::tapmap_command()
        .args(["apply", "--bank", "edges", "--white", "4095", "--jobs", "2"])
        .args(["--follow", "--settle", "1s", "--status-every", "500ms"])
        .arg("--status-log")
        .arg(out.with_extension("status.jsonl"))
        .arg("--out")
        .arg(out)
        .arg(input)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn batch(out: &Path, input: &Path) {
    let r = crate::common::tapmap_command()
        .args([
            "apply", "--bank", "edges", "--white", "4095", "--jobs", "2", "-q",
        ])
        .arg("--out")
        .arg(out)
        .arg(input)
        .output()
        .unwrap();
    // Exit 1: the corrupt captures failed, the rest was written.
    assert_eq!(
        r.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
}

/// The rows of `images.csv` as they stand: path → the statuses of its rows,
/// in file order.
fn rows(out: &Path) -> BTreeMap<String, Vec<String>> {
    let mut m: BTreeMap<String, Vec<String>> = BTreeMap::new();
    let Ok(text) = std::fs::read_to_string(out.join("images.csv")) else {
        return m;
    };
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let status = r
        .headers()
        .unwrap()
        .iter()
        .position(|h| h == "status")
        .unwrap();
    for rec in r.records().flatten() {
        if rec.len() > status {
            m.entry(rec[0].to_string())
                .or_default()
                .push(rec[status].to_string());
        }
    }
    m
}

/// Waits until `done(rows)` holds, failing after `limit`.
fn wait_for(
    out: &Path,
    limit: Duration,
    what: &str,
    done: impl Fn(&BTreeMap<String, Vec<String>>) -> bool,
) {
    let start = Instant::now();
    loop {
        let r = rows(out);
        if done(&r) {
            return;
        }
        assert!(
            start.elapsed() < limit,
            "{what}: not after {limit:?}; {} rows",
            r.len()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// Asks the follower to stop as an operator would, and checks it ends well:
/// exit 1 (the corrupt captures failed, as in a batch), not 128 + signal.
fn stop(child: Child) -> String {
    // SAFETY: sending a signal to our own child process.
    assert_eq!(unsafe { libc::kill(child.id() as i32, libc::SIGTERM) }, 0);
    let r = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&r.stderr).into_owned();
    assert_eq!(r.status.code(), Some(1), "{err}");
    err
}

/// The outputs a batch makes, compared byte for byte; the manifest by its
/// inputs (without modification times).
fn same_outputs(batch: &Path, follow: &Path) {
    let files = |d: &Path| -> BTreeMap<PathBuf, Vec<u8>> {
        walkdir::WalkDir::new(d)
            .into_iter()
            .flatten()
            .filter(|e| e.file_type().is_file())
            .map(|e| e.path().strip_prefix(d).unwrap().to_path_buf())
            .filter(|p| {
                p.starts_with("maps")
                    || p.starts_with("views")
                    || p.extension().is_some_and(|e| e == "csv")
            })
            .map(|p| (p.clone(), std::fs::read(d.join(&p)).unwrap()))
            .collect()
    };
    let (a, b) = (files(batch), files(follow));
    assert_eq!(a.keys().collect::<Vec<_>>(), b.keys().collect::<Vec<_>>());
    for (k, v) in &a {
        assert!(b[k] == *v, "{} differs from the batch run's", k.display());
    }
    let inputs = |d: &Path| {
        let m = crate::common::without_times(
            Path::new("manifest.json"),
            &std::fs::read(d.join("manifest.json")).unwrap(),
        );
        serde_json::from_slice::<serde_json::Value>(&m).unwrap()["inputs"].clone()
    };
    assert_eq!(inputs(batch), inputs(follow), "manifest inputs differ");
    for e in walkdir::WalkDir::new(follow).into_iter().flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        assert!(!name.ends_with(".part"), "temporary file {name} left");
    }
}

const N: u32 = 200;
const EVERY: Duration = Duration::from_millis(30);

#[test]
fn a_followed_folder_ends_as_a_batch_over_it() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("incoming");
    // Some captures are there before the follower starts.
    for i in 0..10 {
        drop_one(&input, i);
    }
    let out = t.path().join("follow");
    let child = follower(&out, &input);
    // The writer writes captures 0–9 again, over the first ones, with the
    // same bytes: they are not done again.
    let w = writer(input.clone(), N, EVERY);
    w.join().unwrap();
    wait_for(&out, Duration::from_secs(60), "all captures", |r| {
        r.len() == N as usize
    });
    assert!(
        rows(&out).values().all(|s| s.len() == 1),
        "a capture was done twice"
    );
    // One capture rewritten after its result: done again, and said so.
    let changed = input.join(place(42));
    std::fs::write(&changed, capture(42, 1)).unwrap();
    let key = place(42).to_string_lossy().into_owned();
    wait_for(
        &out,
        Duration::from_secs(30),
        "the rewritten capture",
        |r| {
            r.get(&key)
                .is_some_and(|s| s.len() == 2 && s[1] == "redone")
        },
    );
    let err = stop(child);
    assert!(err.contains("changed and done again"), "{err}");
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("manifest.json")).unwrap()).unwrap();
    assert_eq!(m["follow"]["redone"], serde_json::json!([key]));
    assert_eq!(m["follow"]["left_waiting"], 0);
    crate::schema::check_file(&m, "manifest.schema.json").unwrap();
    // Status lines were logged, each one JSON object of the documented form.
    let log = std::fs::read_to_string(out.with_extension("status.jsonl")).unwrap();
    for line in log.lines() {
        let v: serde_json::Value = serde_json::from_str(line).unwrap();
        crate::schema::check_file(&v, "follow-status.schema.json").unwrap();
    }
    let last: serde_json::Value = serde_json::from_str(log.lines().last().unwrap()).unwrap();
    assert_eq!(last["format"], "tapmap-follow-status");
    assert!(last["processed"].as_u64().unwrap() > 0);
    // The corrupt ones failed with their names, the rest is as a batch makes it.
    let failed = rows(&out)
        .values()
        .filter(|s| s.last().unwrap() == "failed")
        .count();
    assert_eq!(failed, (0..N).filter(|i| i % 20 == 7).count());
    let reference = t.path().join("batch");
    batch(&reference, &input);
    same_outputs(&reference, &out);
}

#[test]
fn a_follower_killed_at_random_moments_loses_nothing_and_repeats_nothing() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("incoming");
    std::fs::create_dir_all(&input).unwrap();
    let out = t.path().join("follow");
    let w = writer(input.clone(), N, EVERY);
    let mut rng = Lcg(20_261_204);
    let mut kills = Vec::new();
    let run = EVERY * N;
    for _ in 0..3 {
        let child = follower(&out, &input);
        let mut child = child;
        let at = run.mul_f64(0.1 + 0.3 * rng.unit());
        std::thread::sleep(at);
        let _ = child.kill(); // SIGKILL
        let _ = child.wait();
        kills.push(format!(
            "{:.2}s/{} rows",
            at.as_secs_f64(),
            rows(&out).len()
        ));
    }
    w.join().unwrap();
    let child = follower(&out, &input);
    wait_for(&out, Duration::from_secs(60), "all captures", |r| {
        r.len() == N as usize
    });
    stop(child);
    eprintln!("kill points: {}", kills.join(", "));
    // Exactly one row per capture, and the journal holds whole lines only.
    let r = rows(&out);
    assert!(r.values().all(|s| s.len() == 1), "a capture has two rows");
    let journal = std::fs::read_to_string(out.join("journal.jsonl")).unwrap();
    for line in journal.lines() {
        serde_json::from_str::<serde_json::Value>(line).expect("whole journal lines");
    }
    let reference = t.path().join("batch");
    batch(&reference, &input);
    same_outputs(&reference, &out);
}

#[test]
fn polling_finds_files_where_no_events_come() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("incoming");
    std::fs::create_dir_all(&input).unwrap();
    let out = t.path().join("follow");
    let child = crate::common::tapmap_command()
        .args(["apply", "--bank", "edges", "--white", "4095", "--jobs", "2"])
        .args(["--follow", "--poll", "300ms", "--settle", "1s", "--out"])
        .arg(&out)
        .arg(&input)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    writer(input.clone(), 30, EVERY).join().unwrap();
    wait_for(&out, Duration::from_secs(60), "all captures", |r| {
        r.len() == 30
    });
    stop(child);
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("manifest.json")).unwrap()).unwrap();
    assert_eq!(m["follow"]["watch"], "poll");
    assert_eq!(m["follow"]["poll_s"], 0.3);
    let reference = t.path().join("batch");
    batch(&reference, &input);
    same_outputs(&reference, &out);
}

#[test]
fn a_second_signal_stops_at_once_and_a_restart_finishes() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("incoming");
    let out = t.path().join("follow");
    let child = follower(&out, &input_made(&input));
    // Forty captures arrive at once, by rename; two signals while they are
    // being processed.
    let staging = t.path().join("staging");
    std::fs::create_dir_all(&staging).unwrap();
    for i in 0..40 {
        let img = ImageBuffer::from_fn(640, 480, |x, y| {
            Luma([((x * 31 + y * 17 + i * 7 + (x ^ y) % 13) % 4096) as u16])
        });
        let name = format!("big-{i:03}.png");
        img.save(staging.join(&name)).unwrap();
    }
    for i in 0..40 {
        let name = format!("big-{i:03}.png");
        std::fs::rename(staging.join(&name), input.join(&name)).unwrap();
    }
    wait_for(&out, Duration::from_secs(60), "a first result", |r| {
        !r.is_empty()
    });
    for _ in 0..2 {
        // SAFETY: sending a signal to our own child process.
        assert_eq!(unsafe { libc::kill(child.id() as i32, libc::SIGTERM) }, 0);
        std::thread::sleep(Duration::from_millis(20));
    }
    let r = child.wait_with_output().unwrap();
    // Stopped at once (128 + SIGTERM), unless the first signal's orderly end
    // came first (then 0).
    let code = r.status.code();
    assert!(code == Some(143) || code == Some(0), "{code:?}");
    let journal = std::fs::read_to_string(out.join("journal.jsonl")).unwrap();
    for line in journal.lines() {
        serde_json::from_str::<serde_json::Value>(line).expect("whole journal lines");
    }
    // The next start finishes the job: one row each, as a batch writes them.
    let child = follower(&out, &input);
    wait_for(&out, Duration::from_secs(60), "all captures", |r| {
        r.len() == 40
    });
    // SAFETY: sending a signal to our own child process.
    assert_eq!(unsafe { libc::kill(child.id() as i32, libc::SIGTERM) }, 0);
    let r = child.wait_with_output().unwrap();
    assert_eq!(
        r.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
    assert!(rows(&out).values().all(|s| s.len() == 1));
    let reference = t.path().join("batch");
    let b = crate::common::tapmap_command()
        .args([
            "apply", "--bank", "edges", "--white", "4095", "--jobs", "2", "-q",
        ])
        .arg("--out")
        .arg(&reference)
        .arg(&input)
        .output()
        .unwrap();
    assert!(b.status.success());
    same_outputs(&reference, &out);
}

/// An empty folder to follow.
fn input_made(dir: &Path) -> PathBuf {
    std::fs::create_dir_all(dir).unwrap();
    dir.to_path_buf()
}
