//! Shards and merge: the parts are disjoint and cover every input, adding files
//! moves no other file, the scheduler's variables choose the part, and `merge`
//! writes tables byte-identical to one run over everything.

use std::collections::BTreeMap;
use std::path::Path;

use image::{ImageBuffer, Luma};
use tempfile::TempDir;

fn grey(p: &Path, w: u32, h: u32, seed: u32) {
    std::fs::create_dir_all(p.parent().unwrap()).unwrap();
    ImageBuffer::from_fn(w, h, |x, y| {
        Luma([((x * 11 + y * 5 + seed * 37) % 253) as u8])
    })
    .save(p)
    .unwrap();
}

fn corpus(dir: &Path, n: u32) {
    for i in 0..n {
        grey(
            &dir.join(format!("st{}/img-{i:03}.png", i % 3)),
            20 + i % 7,
            16 + i % 5,
            i,
        );
    }
    // A name that sorts differently by text than by path components, and a bad file.
    grey(&dir.join("st0-extra.png"), 9, 9, 99);
    std::fs::write(dir.join("st1/broken.png"), b"\x89PNG\r\n\x1a\nshort").unwrap();
}

fn run(args: &[&str], env: &[(&str, &str)]) -> std::process::Output {
    let mut c = crate::common::tapmap_command();
    c.args(args);
    for (k, v) in env {
        c.env(k, v);
    }
    c.output().unwrap()
}

fn apply_args<'a>(out: &'a str, input: &'a str, extra: &[&'a str]) -> Vec<&'a str> {
    let mut a = vec![
        "apply",
        "--recipe",
        "kernels/line-a-edges.recipe.toml",
        "--save",
        "maps,stats,manifest",
        "-q",
    ];
    a.extend_from_slice(extra);
    a.extend(["--out", out, input]);
    a
}

/// Which shard folder holds each input, from the shards' images.csv files.
fn membership(out: &Path) -> BTreeMap<String, String> {
    let mut m = BTreeMap::new();
    for e in std::fs::read_dir(out).unwrap() {
        let e = e.unwrap();
        let name = e.file_name().to_string_lossy().into_owned();
        if !name.starts_with("shard-") {
            continue;
        }
        let mut r = csv::Reader::from_path(e.path().join("images.csv")).unwrap();
        for rec in r.records() {
            let path = rec.unwrap()[0].to_string();
            assert!(
                m.insert(path.clone(), name.clone()).is_none(),
                "{path} in two shards"
            );
        }
    }
    m
}

#[test]
fn merged_shards_equal_one_run() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("in");
    corpus(&input, 40);
    let (inp, single, sharded) = (
        input.to_str().unwrap(),
        t.path().join("single"),
        t.path().join("sharded"),
    );
    let r = run(&apply_args(single.to_str().unwrap(), inp, &[]), &[]);
    assert_eq!(r.status.code(), Some(1), "the broken file fails");
    for k in 1..=3 {
        let s = format!("{k}/3");
        let r = run(
            &apply_args(sharded.to_str().unwrap(), inp, &["--shard", &s]),
            &[],
        );
        assert!(
            matches!(r.status.code(), Some(0 | 1)),
            "{}",
            String::from_utf8_lossy(&r.stderr)
        );
    }
    let r = run(&["merge", sharded.to_str().unwrap()], &[]);
    assert_eq!(
        r.status.code(),
        Some(1),
        "merge reports the failed input: {}",
        String::from_utf8_lossy(&r.stderr)
    );
    for f in ["stats.csv", "images.csv"] {
        assert_eq!(
            std::fs::read(single.join(f)).unwrap(),
            std::fs::read(sharded.join(f)).unwrap(),
            "{f} differs between one run and the merged shards"
        );
    }
    // Every input is in exactly one shard, and its map is the single run's map.
    let m = membership(&sharded);
    assert_eq!(m.len(), 42);
    let counts: Vec<usize> = (1..=3)
        .map(|k| {
            m.values()
                .filter(|v| **v == format!("shard-{k}-of-3"))
                .count()
        })
        .collect();
    assert!(
        counts.iter().all(|c| *c >= 5),
        "parts far from even: {counts:?}"
    );
    for (path, shard) in &m {
        if path.ends_with("broken.png") {
            continue;
        }
        let rel = Path::new(path).with_extension("npy");
        assert_eq!(
            std::fs::read(single.join("maps").join(&rel)).unwrap(),
            std::fs::read(sharded.join(shard).join("maps").join(&rel)).unwrap(),
            "{path}"
        );
    }
    // The merged manifest lists every input once, its files under its shard folder.
    let man: serde_json::Value =
        serde_json::from_slice(&std::fs::read(sharded.join("manifest.json")).unwrap()).unwrap();
    assert_eq!(man["summary"]["inputs"], 42);
    assert_eq!(man["shards"].as_array().unwrap().len(), 3);
    for e in man["inputs"].as_array().unwrap() {
        for o in e["outputs"].as_array().unwrap() {
            assert!(sharded.join(o["path"].as_str().unwrap()).is_file(), "{o}");
        }
    }
}

#[test]
fn scheduler_variables_choose_the_part() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("in");
    corpus(&input, 12);
    let inp = input.to_str().unwrap();
    let fixed = t.path().join("fixed");
    for k in 1..=4 {
        let s = format!("{k}/4");
        run(
            &apply_args(fixed.to_str().unwrap(), inp, &["--shard", &s]),
            &[],
        );
    }
    // Slurm array 0-3 (ids from SLURM_ARRAY_TASK_MIN) and a Kubernetes indexed job.
    let slurm = t.path().join("slurm");
    for id in 0..4 {
        let id = (id + 10).to_string();
        let r = run(
            &apply_args(slurm.to_str().unwrap(), inp, &["--shard", "auto"]),
            &[
                ("SLURM_ARRAY_TASK_ID", &id),
                ("SLURM_ARRAY_TASK_MIN", "10"),
                ("SLURM_ARRAY_TASK_COUNT", "4"),
            ],
        );
        assert!(
            matches!(r.status.code(), Some(0 | 1)),
            "{}",
            String::from_utf8_lossy(&r.stderr)
        );
    }
    let k8s = t.path().join("k8s");
    for i in 0..4 {
        let i = i.to_string();
        run(
            &apply_args(k8s.to_str().unwrap(), inp, &["--shard", "auto/4"]),
            &[("JOB_COMPLETION_INDEX", &i)],
        );
    }
    assert_eq!(membership(&fixed), membership(&slurm));
    assert_eq!(membership(&fixed), membership(&k8s));
    // Outside a job array, auto is a set-up error.
    let r = run(
        &apply_args(
            t.path().join("x").to_str().unwrap(),
            inp,
            &["--shard", "auto"],
        ),
        &[],
    );
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("SLURM_ARRAY_TASK_ID"));
}

#[test]
fn adding_files_moves_no_other_file() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("in");
    corpus(&input, 30);
    let inp = input.to_str().unwrap();
    let before = t.path().join("before");
    for k in 1..=5 {
        run(
            &apply_args(
                before.to_str().unwrap(),
                inp,
                &["--shard", &format!("{k}/5")],
            ),
            &[],
        );
    }
    for i in 100..120 {
        grey(&input.join(format!("new/late-{i}.png")), 12, 12, i);
    }
    let after = t.path().join("after");
    for k in 1..=5 {
        run(
            &apply_args(
                after.to_str().unwrap(),
                inp,
                &["--shard", &format!("{k}/5")],
            ),
            &[],
        );
    }
    let (b, a) = (membership(&before), membership(&after));
    assert_eq!(a.len(), b.len() + 20);
    for (path, shard) in &b {
        assert_eq!(&a[path], shard, "{path} moved");
    }
}

#[test]
fn merge_refuses_incomplete_or_mixed_shards() {
    let t = TempDir::new().unwrap();
    let input = t.path().join("in");
    corpus(&input, 8);
    let inp = input.to_str().unwrap();
    let out = t.path().join("out");
    let o = out.to_str().unwrap();
    run(&apply_args(o, inp, &["--shard", "1/2"]), &[]);
    let r = run(&["merge", o], &[]);
    assert_eq!(r.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&r.stderr).contains("2/2"),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
    // The second shard with another recipe: a different job.
    let mut other = apply_args(o, inp, &["--shard", "2/2"]);
    other[2] = "kernels/pinhole-blobs.recipe.toml";
    run(&other, &[]);
    let r = run(&["merge", o], &[]);
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("different job"));
    assert!(
        !out.join("stats.csv").exists(),
        "nothing written when the merge is refused"
    );
}
