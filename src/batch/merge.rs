//! `tapmap merge OUT`: the shards of one job (`OUT/shard-K-of-N/`) combined into
//! the `stats.csv`, `images.csv` and `manifest.json` one run over all inputs
//! would have written. The tables are built from the shards' journals with the
//! same code a single run uses, sorted in the same order, so they are byte for
//! byte what one run gives. Maps, views and other files stay in their shard
//! folders; the merged manifest lists them with the shard folder in front.

use std::path::{Path, PathBuf};
use std::time::SystemTime;

use serde_json::{json, Value};

use crate::batch::inputs::path_order_key;
use crate::batch::run::{read_journal, JOURNAL};
use crate::batch::shard::Shard;
use crate::batch::tables::{write_tables, Finished, RunFacts};
use crate::batch::Save;
use crate::error::Error;

/// What a merge combined.
#[derive(Debug, Clone, PartialEq)]
pub struct MergeSummary {
    /// Number of shards.
    pub shards: usize,
    /// Inputs processed without error, over all shards.
    pub processed: usize,
    /// Inputs that failed.
    pub failed: usize,
}

/// Manifest fields that must agree between shards: they decide the outputs.
const SAME_JOB: [&str; 7] = [
    "tool",
    "version",
    "engine",
    "recipe",
    "save",
    "threshold",
    "views",
];

/// Manifest fields that belong to one shard's run; the merged manifest lists
/// them per shard.
const PER_RUN: [&str; 6] = [
    "command_line",
    "started",
    "finished",
    "seconds",
    "threads",
    "shard",
];

fn shard_folders(out: &Path) -> Result<Vec<(Shard, PathBuf)>, Error> {
    let mut found = Vec::new();
    for e in std::fs::read_dir(out).map_err(|e| Error::io(out, e))? {
        let e = e.map_err(|e| Error::io(out, e))?;
        if let Some(s) = Shard::from_folder(&e.file_name().to_string_lossy()) {
            if e.path().is_dir() {
                found.push((s, e.path()));
            }
        }
    }
    if found.is_empty() {
        return Err(Error::Stage(format!(
            "{}: no shard folders (shard-K-of-N) to merge",
            out.display()
        )));
    }
    found.sort_by_key(|(s, _)| (s.count, s.index));
    let n = found[0].0.count;
    if let Some((s, _)) = found.iter().find(|(s, _)| s.count != n) {
        return Err(Error::Stage(format!(
            "{}: shards of different jobs side by side (of {n} and of {}); move one set away",
            out.display(),
            s.count
        )));
    }
    let missing: Vec<String> = (1..=n)
        .filter(|k| !found.iter().any(|(s, _)| s.index == *k))
        .map(|k| format!("{k}/{n}"))
        .collect();
    if !missing.is_empty() {
        return Err(Error::Stage(format!(
            "{}: shard(s) {} not there; run them (with --shard K/{n}) before merging",
            out.display(),
            missing.join(", ")
        )));
    }
    Ok(found)
}

fn read_manifest(dir: &Path, shard: Shard) -> Result<serde_json::Map<String, Value>, Error> {
    let path = dir.join("manifest.json");
    let text = std::fs::read_to_string(&path).map_err(|e| {
        Error::Stage(format!(
            "{}: {e}; shard {shard} has not finished, or ran without manifest in --save \
             (merge needs it); run it again with --resume",
            path.display()
        ))
    })?;
    let v: Value = serde_json::from_str(&text)
        .map_err(|e| Error::Stage(format!("{}: not a tapmap manifest: {e}", path.display())))?;
    let m = match v {
        Value::Object(m) if m.get("tool") == Some(&json!("tapmap")) => m,
        _ => {
            return Err(Error::Stage(format!(
                "{}: not a tapmap manifest",
                path.display()
            )))
        }
    };
    if let Some(i) = m.get("interrupted") {
        return Err(Error::Stage(format!(
            "shard {shard} was interrupted ({i}); finish it with --resume before merging"
        )));
    }
    Ok(m)
}

/// Merges the shards below `out` (see the module header) and writes the tables
/// into `out`. `command_line` goes into the merged manifest.
pub fn merge(out: &Path, command_line: Vec<String>) -> Result<MergeSummary, Error> {
    let shards = shard_folders(out)?;
    let mut first: Option<serde_json::Map<String, Value>> = None;
    let mut done: Vec<Finished> = Vec::new();
    let mut runs = Vec::new();
    let (mut started, mut finished): (Option<String>, Option<String>) = (None, None);
    for (shard, dir) in &shards {
        let m = read_manifest(dir, *shard)?;
        if let Some(f) = &first {
            if let Some(field) = SAME_JOB.iter().find(|k| f.get(**k) != m.get(**k)) {
                return Err(Error::Stage(format!(
                    "shard {shard} ran a different job from shard 1/{} ('{field}' differs in its manifest.json)",
                    shard.count
                )));
            }
        }
        let records = read_journal(&dir.join(JOURNAL), None);
        let listed = m
            .get("summary")
            .and_then(|s| s.get("inputs"))
            .and_then(Value::as_u64);
        if listed != Some(records.len() as u64) {
            return Err(Error::Stage(format!(
                "{}: its {JOURNAL} holds {} inputs but its manifest.json {}; run the shard again with --resume",
                dir.display(),
                records.len(),
                listed.map_or("lists none".into(), |n| format!("lists {n}"))
            )));
        }
        // RFC 3339 times in one zone compare as text.
        let text = |k: &str| m.get(k).and_then(Value::as_str).map(str::to_string);
        started = match (started, text("started")) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        };
        finished = match (finished, text("finished")) {
            (Some(a), Some(b)) => Some(a.max(b)),
            (a, b) => a.or(b),
        };
        let mut run = serde_json::Map::new();
        run.insert("folder".into(), json!(shard.folder()));
        for k in PER_RUN {
            if let Some(v) = m.get(k) {
                run.insert(k.into(), v.clone());
            }
        }
        run.insert(
            "summary".into(),
            m.get("summary").cloned().unwrap_or(Value::Null),
        );
        runs.push(Value::Object(run));
        let folder = shard.folder();
        done.extend(records.into_iter().map(|r| r.under(&folder)));
        first.get_or_insert(m);
    }
    let mut header = first.expect("at least one shard");
    for k in PER_RUN {
        header.remove(k);
    }
    header.remove("summary");
    header.remove("files");
    header.remove("inputs");
    header.remove("resumed");
    header.insert("command_line".into(), json!(command_line));
    header.insert("started".into(), json!(started));
    header.insert(
        "finished".into(),
        json!(finished
            .or_else(|| Some(humantime::format_rfc3339_seconds(SystemTime::now()).to_string()))),
    );
    // One run's order: sorted by relative path, component by component.
    done.sort_by(|a, b| path_order_key(&a.path).cmp(&path_order_key(&b.path)));
    if let Some(w) = done.windows(2).find(|w| w[0].path == w[1].path) {
        return Err(Error::Stage(format!(
            "input {} appears in two shards; were the shards run over different inputs?",
            w[0].path
        )));
    }
    let save: Save = header
        .get("save")
        .and_then(Value::as_str)
        .unwrap_or("")
        .parse()
        .map_err(Error::Stage)?;
    let facts = RunFacts {
        header,
        stats: save.stats,
        manifest: true,
    };
    let mut extra = serde_json::Map::new();
    extra.insert("shards".into(), Value::Array(runs));
    write_tables(out, &facts, &done, extra)?;
    let failed = done.iter().filter(|d| !d.ok).count();
    Ok(MergeSummary {
        shards: shards.len(),
        processed: done.len() - failed,
        failed,
    })
}
