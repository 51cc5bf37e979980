//! `stats.csv`, `images.csv` and `manifest.json`. Rows come in input order (sorted
//! by relative path) and channel order, so the tables are the same whatever
//! order the worker threads finished in. Numbers are written in Rust's shortest
//! round-trip decimal form; a missing value is an empty field.

use std::path::{Path, PathBuf};
use std::time::SystemTime;

use serde::{Deserialize, Serialize};
use serde_json::{json, Value};

use crate::batch::inputs::InputItem;
use crate::batch::run::ApplyJob;
use crate::error::Error;
use crate::geometry::Extent;
use crate::io::atomic::write_atomic;
use crate::io::read::ImageMeta;
use crate::kernel::bankfile::bank_to_toml;
use crate::render::colormap;
use crate::render::view::ViewMapping;
use crate::stage::recipefile::RecipeSpec;
use crate::stage::{PoolWindow, Stage};
use crate::stats::MapStats;

/// One written file, relative to the output folder.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputFile {
    /// Path below `--out`.
    pub path: PathBuf,
    /// Size in bytes.
    pub bytes: u64,
}

/// One `stats.csv` row.
#[derive(Debug, Clone, PartialEq)]
pub struct StatsRow {
    /// Channel index.
    pub channel: usize,
    /// Channel (kernel) name.
    pub name: String,
    /// Map width.
    pub width: usize,
    /// Map height.
    pub height: usize,
    /// The statistics.
    pub stats: MapStats,
}

/// One view and its mapping, for the manifest.
#[derive(Debug, Clone, PartialEq)]
pub struct ViewRecord {
    /// Channel index.
    pub channel: usize,
    /// Channel name.
    pub name: String,
    /// File below `--out`.
    pub file: PathBuf,
    /// Value mapping.
    pub mapping: ViewMapping,
}

/// Everything recorded about one input.
#[derive(Debug, Clone, PartialEq)]
pub struct ImageRecord {
    /// Relative path with `/`.
    pub path: String,
    /// SHA-256 of the file, when it could be read.
    pub sha256: Option<String>,
    /// What the file said about itself, when it decoded.
    pub meta: Option<ImageMeta>,
    /// `Ok` or the reason it failed.
    pub status: Result<(), String>,
    /// Statistics rows.
    pub stats: Vec<StatsRow>,
    /// Views.
    pub views: Vec<ViewRecord>,
    /// Files written for it.
    pub outputs: Vec<OutputFile>,
}

impl ImageRecord {
    /// An empty record for an input.
    pub fn new(item: &InputItem) -> Self {
        ImageRecord {
            path: item.rel_string(),
            sha256: None,
            meta: None,
            status: Ok(()),
            stats: Vec::new(),
            views: Vec::new(),
            outputs: Vec::new(),
        }
    }
}

/// One input's finished result in the form the tables need: its `images.csv` row,
/// its `stats.csv` rows and its manifest entry, ready to write. A run keeps these
/// (in `journal.jsonl`, see [`crate::batch::run`]) so that `--resume` and
/// `merge` write exactly the tables one uninterrupted run writes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Finished {
    /// Relative path with `/`.
    pub path: String,
    /// SHA-256 of the input, when it could be read.
    pub sha256: Option<String>,
    /// Whether it was processed without error.
    pub ok: bool,
    /// The `images.csv` row.
    pub images_row: Vec<String>,
    /// The `stats.csv` rows.
    pub stats_rows: Vec<Vec<String>>,
    /// Files written for it: path below the run's folder (with `/`) and size.
    pub outputs: Vec<(String, u64)>,
    /// The manifest's `inputs` entry.
    pub entry: Value,
}

impl Finished {
    /// The same result seen from a folder above the run's: output paths get
    /// `prefix/` in front (used by `merge` for shard folders).
    pub fn under(mut self, prefix: &str) -> Self {
        let add = |p: &str| format!("{prefix}/{p}");
        for o in &mut self.outputs {
            o.0 = add(&o.0);
        }
        for (list, key) in [("outputs", "path"), ("views", "file")] {
            if let Some(Value::Array(items)) = self.entry.get_mut(list) {
                for it in items {
                    if let Some(Value::String(p)) = it.get_mut(key) {
                        *p = add(p);
                    }
                }
            }
        }
        self
    }
}

impl ImageRecord {
    /// The rows and manifest entry of this record.
    pub fn finish(&self) -> Finished {
        Finished {
            path: self.path.clone(),
            sha256: self.sha256.clone(),
            ok: self.status.is_ok(),
            images_row: images_row(self),
            stats_rows: stats_rows(self),
            outputs: self
                .outputs
                .iter()
                .map(|o| (slash(&o.path), o.bytes))
                .collect(),
            entry: manifest_entry(self),
        }
    }
}

fn num(v: f64) -> String {
    if v.is_finite() {
        format!("{v}")
    } else {
        String::new()
    }
}

fn slash(p: &std::path::Path) -> String {
    p.components()
        .map(|c| c.as_os_str().to_string_lossy().into_owned())
        .collect::<Vec<_>>()
        .join("/")
}

/// Column names of `stats.csv`.
pub const STATS_COLUMNS: [&str; 16] = [
    "path",
    "channel",
    "name",
    "width",
    "height",
    "min",
    "max",
    "mean",
    "std",
    "p01",
    "p50",
    "p99",
    "zero_fraction",
    "above_fraction",
    "count",
    "non_finite",
];

/// Column names of `images.csv`.
pub const IMAGES_COLUMNS: [&str; 15] = [
    "path",
    "sha256",
    "width",
    "height",
    "bit_depth",
    "sample",
    "color",
    "white",
    "orientation",
    "orientation_applied",
    "captured",
    "exposure_s",
    "status",
    "error",
    "maps_written",
];

/// CSV text: a header line, then the rows (RFC 4180 quoting by the csv crate).
pub fn csv_bytes(
    header: &[&str],
    rows: impl IntoIterator<Item = Vec<String>>,
) -> Result<Vec<u8>, Error> {
    let mut w = csv::Writer::from_writer(Vec::new());
    let e = |e: csv::Error| Error::Stage(format!("CSV: {e}"));
    w.write_record(header).map_err(e)?;
    for r in rows {
        w.write_record(&r).map_err(e)?;
    }
    w.into_inner()
        .map_err(|e| Error::Stage(format!("CSV: {e}")))
}

fn stats_rows(r: &ImageRecord) -> Vec<Vec<String>> {
    r.stats
        .iter()
        .map(|s| {
            let m = &s.stats;
            vec![
                r.path.clone(),
                s.channel.to_string(),
                s.name.clone(),
                s.width.to_string(),
                s.height.to_string(),
                num(m.min),
                num(m.max),
                num(m.mean),
                num(m.std),
                num(m.p1),
                num(m.p50),
                num(m.p99),
                num(m.zero_fraction),
                m.above_fraction.map_or(String::new(), num),
                m.count.to_string(),
                m.non_finite.to_string(),
            ]
        })
        .collect()
}

fn images_row(r: &ImageRecord) -> Vec<String> {
    let m = r.meta.clone().unwrap_or_default();
    let have = r.meta.is_some();
    let opt = |s: Option<String>| s.unwrap_or_default();
    let known = |s: String| if have { s } else { String::new() };
    vec![
        r.path.clone(),
        opt(r.sha256.clone()),
        known(m.width.to_string()),
        known(m.height.to_string()),
        known(m.bit_depth.to_string()),
        known((if m.float { "float" } else { "int" }).to_string()),
        m.color.to_string(),
        opt(m.white.map(|w| w.to_string())),
        opt(m.orientation.map(|o| o.to_string())),
        known(m.orientation_applied.to_string()),
        opt(m.captured.clone()),
        opt(m.exposure.clone()),
        if r.status.is_ok() { "ok" } else { "failed" }.to_string(),
        r.status.clone().err().unwrap_or_default(),
        r.outputs
            .iter()
            .filter(|o| o.path.extension().is_some_and(|e| e == "npy"))
            .count()
            .to_string(),
    ]
}

fn manifest_entry(r: &ImageRecord) -> Value {
    json!({
        "path": r.path,
        "sha256": r.sha256,
        "status": if r.status.is_ok() { "ok" } else { "failed" },
        "error": r.status.clone().err(),
        "outputs": r.outputs.iter().map(|o| json!({"path": slash(&o.path), "bytes": o.bytes})).collect::<Vec<_>>(),
        "views": r.views.iter().map(|v| json!({
            "channel": v.channel, "name": v.name, "file": slash(&v.file),
            "scale": v.mapping.scale, "lo": v.mapping.lo, "hi": v.mapping.hi, "levels": v.mapping.levels,
        })).collect::<Vec<_>>(),
    })
}

/// What the tables of a run say about the run as a whole, beside the inputs.
#[derive(Debug, Clone)]
pub struct RunFacts {
    /// The fields of the manifest that describe the job (tool, version, command
    /// line, times, recipe, options), in order.
    pub header: serde_json::Map<String, Value>,
    /// Write `stats.csv`.
    pub stats: bool,
    /// Write `manifest.json`.
    pub manifest: bool,
}

/// The manifest fields that describe an `apply` job.
pub fn job_header(
    job: &ApplyJob,
    table: &[[u8; 3]],
    started: SystemTime,
    seconds: f64,
) -> serde_json::Map<String, Value> {
    let v = json!({
        "tool": "tapmap",
        "version": env!("CARGO_PKG_VERSION"),
        "command_line": job.command_line,
        "started": humantime::format_rfc3339_seconds(started).to_string(),
        "finished": humantime::format_rfc3339_seconds(SystemTime::now()).to_string(),
        "seconds": seconds,
        "threads": job.jobs,
        "engine": job.engine.name(),
        "recipe": recipe_json(&job.spec),
        "save": job.save.to_string(),
        "threshold": job.threshold,
        "views": {
            "range": job.view.range.map(|(a, b)| [a, b]),
            "grey": "level L of D (D = levels) stands for lo + L/D·(hi − lo)",
            "diverging": "table index i (0–255) stands for (i − 127.5)/127.5·hi when i ≥ 127.5, (i − 127.5)/127.5·|lo| below",
            "diverging_method": "Moreland 2009, Msh interpolation",
            "diverging_endpoints": [colormap::NEGATIVE, colormap::POSITIVE],
            "diverging_table": table,
        },
    });
    match v {
        Value::Object(m) => m,
        _ => unreachable!("a JSON object literal"),
    }
}

/// Writes `stats.csv` (when asked), `images.csv` and `manifest.json` (when asked)
/// into `out`; returns how many files it wrote. `extra` fields go into the
/// manifest after the summary (shards, interruption, resumed count).
pub fn write_tables(
    out: &Path,
    facts: &RunFacts,
    done: &[Finished],
    extra: serde_json::Map<String, Value>,
) -> Result<usize, Error> {
    let mut run_files = Vec::new();
    let mut write = |name: &str, bytes: &[u8]| -> Result<(), Error> {
        write_atomic(&out.join(name), |w| w.write_all(bytes))?;
        run_files.push(json!({"path": name, "bytes": bytes.len()}));
        Ok(())
    };
    if facts.stats {
        let rows = done.iter().flat_map(|d| d.stats_rows.iter().cloned());
        write("stats.csv", &csv_bytes(&STATS_COLUMNS, rows)?)?;
    }
    let rows = done.iter().map(|d| d.images_row.clone());
    write("images.csv", &csv_bytes(&IMAGES_COLUMNS, rows)?)?;
    let written = run_files.len();
    if !facts.manifest {
        return Ok(written);
    }
    let failed = done.iter().filter(|d| !d.ok).count();
    let mut m = facts.header.clone();
    m.insert(
        "summary".into(),
        json!({"inputs": done.len(), "processed": done.len() - failed, "failed": failed}),
    );
    m.extend(extra);
    m.insert("files".into(), Value::Array(run_files));
    m.insert(
        "inputs".into(),
        Value::Array(done.iter().map(|d| d.entry.clone()).collect()),
    );
    let text = serde_json::to_string_pretty(&Value::Object(m))
        .map_err(|e| Error::Stage(format!("manifest: {e}")))?;
    write_atomic(&out.join("manifest.json"), |w| w.write_all(text.as_bytes()))?;
    Ok(written + 1)
}

/// The resolved recipe as JSON, banks included whole (as bank-file text) so the
/// run can be repeated even if the bank files change.
pub fn recipe_json(spec: &RecipeSpec) -> Value {
    let stages: Vec<Value> = spec
        .recipe
        .stages
        .iter()
        .map(|s| match s {
            Stage::Conv(c) => {
                let o = &c.options;
                let extent = match o.extent {
                    Extent::Explicit(p) => {
                        json!({"top": p.top, "bottom": p.bottom, "left": p.left, "right": p.right})
                    }
                    e => json!(e.to_string()),
                };
                json!({
                    "stage": "conv",
                    "bank": c.bank.name,
                    "bank_sha256": c.bank.digest(),
                    "bank_file": bank_to_toml(&c.bank).unwrap_or_default(),
                    "kernels": c.bank.kernels.iter().map(|k| k.name.clone()).collect::<Vec<_>>(),
                    "op": c.op().name(),
                    "pad": o.pad.name(),
                    "extent": extent,
                    "stride": [o.stride.0, o.stride.1],
                    "dilation": [o.dilation.0, o.dilation.1],
                })
            }
            Stage::Act(a) => json!({"stage": "act", "act": a.to_string()}),
            Stage::Pool(p) => match p.window {
                PoolWindow::Global => {
                    json!({"stage": "pool", "pool": p.kind.to_string(), "size": "global"})
                }
                PoolWindow::Sized { size, stride } => json!({
                    "stage": "pool", "pool": p.kind.to_string(),
                    "size": [size.0, size.1], "stride": [stride.0, stride.1],
                }),
            },
        })
        .collect();
    json!({
        "input": {
            "color": spec.input.color.name(),
            "white": spec.input.white,
            "orientation": if spec.input.apply_orientation { "apply" } else { "ignore" },
        },
        "stages": stages,
    })
}
