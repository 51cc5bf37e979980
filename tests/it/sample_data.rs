//! The committed sample captures are exactly what the generator draws.

use std::path::{Path, PathBuf};

fn example_binary() -> PathBuf {
    // cargo test builds examples next to the test binaries' parent folder.
    let exe = std::env::current_exe().unwrap();
    let dir = exe.parent().unwrap().parent().unwrap().join("examples");
    dir.join(format!("make_samples{}", std::env::consts::EXE_SUFFIX))
}

fn files(root: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = walkdir::WalkDir::new(root)
        .into_iter()
        .map(|e| e.unwrap())
        .filter(|e| e.file_type().is_file())
        .map(|e| e.path().strip_prefix(root).unwrap().to_path_buf())
        .collect();
    v.sort();
    v
}

#[test]
fn generator_reproduces_the_committed_samples_byte_for_byte() {
    let bin = example_binary();
    assert!(bin.is_file(), "example not built at {}", bin.display());
    let t = tempfile::TempDir::new().unwrap();
    let status = std::process::Command::new(&bin)
        .arg(t.path())
        .status()
        .unwrap();
    assert!(status.success());
    let committed = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample_data");
    assert_eq!(files(t.path()), files(&committed));
    let mut total = 0;
    for f in files(&committed) {
        let a = std::fs::read(committed.join(&f)).unwrap();
        total += a.len();
        assert!(
            a == std::fs::read(t.path().join(&f)).unwrap(),
            "{} differs from the generator's output",
            f.display()
        );
    }
    assert!(
        total < 3_000_000,
        "sample data stays under 3 MB: {total} bytes"
    );
}
