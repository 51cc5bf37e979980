//! Every command the README shows in a `sh` block runs as written on the
//! shipped samples, in the README's order (later commands use what earlier
//! ones wrote, as a reader trying them in turn would). Scripts meant for a
//! scheduler are `bash` blocks and are not run here (scripts/cluster-smoke.sh
//! runs the Slurm one).

use std::path::Path;
use std::process::Command;

/// The `tapmap …` commands of the README's `sh` blocks, continuation lines
/// joined.
fn readme_commands() -> Vec<String> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(root.join("README.md")).unwrap();
    let (mut out, mut in_sh, mut pending) = (Vec::new(), false, String::new());
    for line in text.lines() {
        let t = line.trim();
        if !in_sh {
            in_sh = t == "```sh";
            continue;
        }
        if t.starts_with("```") {
            in_sh = false;
            continue;
        }
        let joined = format!("{pending}{t}");
        if let Some(head) = joined.strip_suffix('\\') {
            pending = format!("{} ", head.trim_end());
            continue;
        }
        pending.clear();
        if joined.starts_with("tapmap ") {
            out.push(joined);
        }
    }
    out
}

#[test]
fn every_readme_command_runs_as_written_on_the_shipped_samples() {
    let commands = readme_commands();
    assert!(commands.len() >= 15, "{} commands found", commands.len());
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let t = tempfile::TempDir::new().unwrap();
    for shipped in ["kernels", "sample_data"] {
        std::os::unix::fs::symlink(root.join(shipped), t.path().join(shipped)).unwrap();
    }
    let bin = Path::new(env!("CARGO_BIN_EXE_tapmap")).parent().unwrap();
    let path = format!(
        "{}:{}",
        bin.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    for c in &commands {
        if c.contains("--follow") {
            follow_example(c, t.path(), &path);
            continue;
        }
        let o = Command::new("bash")
            .arg("-c")
            .arg(c)
            .current_dir(t.path())
            .env("PATH", &path)
            .output()
            .unwrap();
        assert!(
            o.status.success(),
            "README command failed ({:?}):\n  {c}\n{}",
            o.status.code(),
            String::from_utf8_lossy(&o.stderr)
        );
    }
    // What the commands promise is there.
    for f in [
        "line-a.toml",
        "runs/night/manifest.json",
        "runs/s1/stats.csv",
        "runs/pooled/maps/s1-glaze/tile-0001-crack.npy",
        "runs/learned.toml",
        "runs/learned-taps.png",
        "runs/probe/overview.png",
        "runs/borders/summary.csv",
    ] {
        assert!(t.path().join(f).is_file(), "{f} missing");
    }
    // The glob example matches the station-1 PNGs only (two; its third capture is a TIFF).
    let s1 = std::fs::read_to_string(t.path().join("runs/s1/images.csv")).unwrap();
    assert_eq!(s1.lines().count(), 1 + 2, "{s1}");
}

/// The follow example as the README tells it: the samples copied to the
/// folder the line writes into, the follower started, one capture arriving
/// by rename, then a stop by SIGTERM, which ends with exit 0.
fn follow_example(c: &str, dir: &Path, path: &str) {
    let incoming = dir.join("incoming/line-a");
    for e in walkdir::WalkDir::new(dir.join("sample_data/line-a")).follow_links(true) {
        let e = e.unwrap();
        let rel = e
            .path()
            .strip_prefix(dir.join("sample_data/line-a"))
            .unwrap();
        if e.file_type().is_dir() {
            std::fs::create_dir_all(incoming.join(rel)).unwrap();
        } else {
            std::fs::copy(e.path(), incoming.join(rel)).unwrap();
        }
    }
    let mut child = Command::new("bash")
        .arg("-c")
        .arg(format!("exec {c}"))
        .current_dir(dir)
        .env("PATH", path)
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let out = dir.join(
        c.split_whitespace()
            .skip_while(|w| *w != "--out")
            .nth(1)
            .unwrap(),
    );
    let rows = || {
        std::fs::read_to_string(out.join("images.csv"))
            .map(|t| t.lines().count().saturating_sub(1))
            .unwrap_or(0)
    };
    let wait = |n: usize| {
        let start = std::time::Instant::now();
        while rows() < n {
            assert!(
                start.elapsed() < std::time::Duration::from_secs(120),
                "the follower did not take {n} captures"
            );
            std::thread::sleep(std::time::Duration::from_millis(100));
        }
    };
    wait(7);
    let s1 = incoming.join("s1-glaze");
    let part = s1.join("tile-0101.png.part");
    std::fs::copy(s1.join("tile-0001-crack.png"), &part).unwrap();
    std::fs::rename(&part, s1.join("tile-0101.png")).unwrap();
    wait(8);
    // SAFETY: sending a signal to our own child process.
    assert_eq!(unsafe { libc::kill(child.id() as i32, libc::SIGTERM) }, 0);
    let status = child.wait().unwrap();
    let mut err = String::new();
    std::io::Read::read_to_string(&mut child.stderr.take().unwrap(), &mut err).unwrap();
    assert_eq!(status.code(), Some(0), "{c}\n{err}");
    assert!(err.contains("1 arrived while following"), "{err}");
    assert!(out.join("manifest.json").is_file());
}
