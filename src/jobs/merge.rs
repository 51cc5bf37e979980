//! `tapmap merge OUT`: the shards of one job (`OUT/shard-K-of-N/`) combined into
//! the `stats.csv`, `images.csv` and `manifest.json` one run over all inputs
//! would have written. The tables are built from the shards' journals with the
//! same code a single run uses, sorted in the same order, so they are byte for
//! byte what one run gives. Maps, views and other files stay in their shard
//! folders; the merged manifest lists them with the shard folder in front.

use std::path::{Path, PathBuf};
use std::time::SystemTime;

use crate::error::Error;
use crate::jobs::apply::{read_journal, JOURNAL};
use crate::jobs::inputs::path_order_key;
use crate::jobs::manifest::{
    read_manifest, write_manifest, FileRecord, ListRecord, Manifest, ShardRun, SummaryRecord,
    MANIFEST_FORMAT, MANIFEST_VERSION,
};
use crate::jobs::shard::Shard;
use crate::jobs::tables::{write_tables, Finished};
use crate::jobs::Save;

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
        return Err(Error::Usage(format!(
            "{}: no shard folders (shard-K-of-N) to merge",
            out.display()
        )));
    }
    found.sort_by_key(|(s, _)| (s.count, s.index));
    let n = found[0].0.count;
    if let Some((s, _)) = found.iter().find(|(s, _)| s.count != n) {
        return Err(Error::Usage(format!(
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
        return Err(Error::Usage(format!(
            "{}: shard(s) {} not there; run them (with --shard K/{n}) before merging",
            out.display(),
            missing.join(", ")
        )));
    }
    Ok(found)
}

fn shard_manifest(dir: &Path, shard: Shard) -> Result<Manifest, Error> {
    let path = dir.join("manifest.json");
    if !path.is_file() {
        return Err(Error::record(
            &path,
            format!(
                "is missing; shard {shard} has not finished, or ran without manifest in --save \
                 (merge needs it); run it again with --resume"
            ),
        ));
    }
    let m = read_manifest(&path)?;
    if let Some(i) = m.interrupted {
        return Err(Error::record(
            &path,
            format!(
                "shard {shard} was interrupted (signal {}, {} not run); finish it with --resume \
                 before merging",
                i.signal, i.not_run
            ),
        ));
    }
    Ok(m)
}

/// Merges the shards below `out` (see the module header) and writes the tables
/// into `out`. `command_line` goes into the merged manifest.
pub fn merge(out: &Path, command_line: Vec<String>) -> Result<MergeSummary, Error> {
    let shards = shard_folders(out)?;
    let _lock = crate::jobs::OutLock::take(out)?;
    let mut first: Option<Manifest> = None;
    let mut done: Vec<Finished> = Vec::new();
    let mut runs = Vec::new();
    let (mut started, mut finished): (Option<String>, Option<String>) = (None, None);
    for (shard, dir) in &shards {
        let m = shard_manifest(dir, *shard)?;
        if let Some(f) = &first {
            let differs = if f.version != m.version {
                Some("version")
            } else if f.job.engine != m.job.engine {
                Some("engine")
            } else if f.job.recipe != m.job.recipe {
                Some("recipe")
            } else if f.job.save != m.job.save {
                Some("save")
            } else if f.job.threshold != m.job.threshold {
                Some("threshold")
            } else if f.job.connectivity != m.job.connectivity || f.job.inset != m.job.inset {
                Some("connectivity")
            } else if f.job.views != m.job.views {
                Some("views")
            } else {
                None
            };
            if f.listed != m.listed {
                let say = |l: &Option<ListRecord>| match l {
                    Some(l) => format!("{} inputs, list digest {}", l.count, &l.sha256[..12]),
                    None => "no record of its input list".to_string(),
                };
                return Err(Error::record(
                    dir.join("manifest.json"),
                    format!(
                        "shard {shard} saw another input list than shard 1/{} ({} against {}): \
                         files were added, removed or renamed between the shards' runs, or the \
                         shards were given other inputs; run every shard again over the same \
                         inputs",
                        shard.count,
                        say(&m.listed),
                        say(&f.listed)
                    ),
                ));
            }
            if let Some(field) = differs {
                return Err(Error::record(
                    dir.join("manifest.json"),
                    format!(
                        "shard {shard} ran a different job from shard 1/{} ('{field}' differs)",
                        shard.count
                    ),
                ));
            }
        }
        let records = read_journal(&dir.join(JOURNAL), None)?;
        if m.summary.inputs != records.len() {
            return Err(Error::record(
                dir.join(JOURNAL),
                format!(
                    "holds {} inputs but its manifest.json lists {}; run the shard again with --resume",
                    records.len(),
                    m.summary.inputs
                ),
            ));
        }
        // RFC 3339 times in one zone compare as text.
        started = match (started, m.started.clone()) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        };
        finished = match (finished, m.finished.clone()) {
            (Some(a), Some(b)) => Some(a.max(b)),
            (a, b) => a.or(b),
        };
        runs.push(ShardRun {
            folder: shard.folder(),
            shard: m.shard.clone(),
            command_line: m.command_line.clone(),
            started: m.started.clone(),
            finished: m.finished.clone(),
            seconds: m.seconds,
            threads: m.threads,
            summary: m.summary,
        });
        let folder = shard.folder();
        done.extend(records.into_iter().map(|r| r.under(&folder)));
        first.get_or_insert(m);
    }
    let first = first.expect("at least one shard");
    // One run's order: sorted by relative path, component by component.
    done.sort_by(|a, b| path_order_key(a.path()).cmp(&path_order_key(b.path())));
    if let Some(w) = done.windows(2).find(|w| w[0].path() == w[1].path()) {
        return Err(Error::usage(format!(
            "input {} appears in two shards; were the shards run over different inputs?",
            w[0].path()
        )));
    }
    if let Some(l) = &first.listed {
        if l.count != done.len() {
            return Err(Error::usage(format!(
                "{}: the shards hold {} inputs but their job listed {}; a shard left some out",
                out.display(),
                done.len(),
                l.count
            )));
        }
    }
    let save: Save = first.job.save.parse().map_err(Error::Usage)?;
    let mut files = write_tables(out, &done, save.stats)?;
    let failed = done.iter().filter(|d| !d.ok()).count();
    let manifest = Manifest {
        format: MANIFEST_FORMAT.into(),
        manifest_version: MANIFEST_VERSION,
        tool: "tapmap".into(),
        version: first.version.clone(),
        job: first.job.clone(),
        command_line,
        started,
        finished: finished
            .or_else(|| Some(humantime::format_rfc3339_seconds(SystemTime::now()).to_string())),
        seconds: None,
        threads: None,
        summary: SummaryRecord {
            inputs: done.len(),
            processed: done.len() - failed,
            failed,
        },
        listed: first.listed.clone(),
        shard: None,
        resumed: None,
        interrupted: None,
        follow: None,
        shards: Some(runs),
        files: files.clone(),
        inputs: done.iter().map(|d| d.entry.clone()).collect(),
    };
    let bytes = write_manifest(&out.join("manifest.json"), &manifest)?;
    files.push(FileRecord {
        path: "manifest.json".into(),
        bytes,
        modified: None,
    });
    Ok(MergeSummary {
        shards: shards.len(),
        processed: done.len() - failed,
        failed,
    })
}
