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
