//! `manifest.json`: the record of a run, typed, from which the run can be
//! repeated: tool version, command line, the resolved recipe with every bank's
//! whole text and digest, options, times, every input with its digest and
//! outcome, and every file written with its size. Its JSON Schema is
//! `shared/schemas/manifest.schema.json`.
//!
//! Every manifest starts with `format` (`tapmap-manifest`) and
//! `manifest_version`; [`read_manifest`] checks both before anything else, so a
//! file of another program's or of a newer tapmap's is refused with a message
//! that says which.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::Error;
use crate::geometry::Extent;
use crate::kernel::bankfile::bank_to_toml;
use crate::render::colormap;
use crate::render::view::ViewMapping;
use crate::stage::{PoolWindow, RecipeSpec, Stage};

/// The `format` every manifest carries.
pub const MANIFEST_FORMAT: &str = "tapmap-manifest";
/// The manifest layout this tapmap writes and reads.
pub const MANIFEST_VERSION: u32 = 1;

/// The whole manifest of an `apply` run or a `merge`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// Always [`MANIFEST_FORMAT`].
    pub format: String,
    /// [`MANIFEST_VERSION`] of the tapmap that wrote it.
    pub manifest_version: u32,
    /// Always `tapmap`.
    pub tool: String,
    /// Version of the tapmap that wrote it.
    pub version: String,
    /// The job: what decides the outputs.
    #[serde(flatten)]
    pub job: JobRecord,
    /// The command line as given.
    pub command_line: Vec<String>,
    /// Start, RFC 3339 UTC.
    pub started: Option<String>,
    /// End, RFC 3339 UTC.
    pub finished: Option<String>,
    /// Wall time in seconds.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub seconds: Option<f64>,
    /// Threads (and images in flight).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub threads: Option<usize>,
    /// Inputs, processed and failed.
    pub summary: SummaryRecord,
    /// The whole sorted input list the job was given (before any shard took
    /// its part): how many, and a digest of it; shards of one job agree on it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub listed: Option<ListRecord>,
    /// In a shard's own manifest: `K/N`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<String>,
    /// With `--resume`: inputs taken over from the earlier run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub resumed: Option<usize>,
    /// When a signal stopped the run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub interrupted: Option<Interrupted>,
    /// In a merged manifest: each shard's run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shards: Option<Vec<ShardRun>>,
    /// With `apply --follow`: how the folder was followed and what arrived.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub follow: Option<FollowRecord>,
    /// Run-level files (the tables) with their sizes.
    pub files: Vec<FileRecord>,
    /// Per input: path, digest, outcome, files, views.
    pub inputs: Vec<InputRecord>,
}

/// What decides an `apply` job's outputs; shards of one job agree on all of it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct JobRecord {
    /// `--engine`.
    pub engine: String,
    /// Input handling and stages, banks included whole.
    pub recipe: RecipeRecord,
    /// Outputs chosen.
    pub save: String,
    /// `--threshold`: a number, `otsu`, or none.
    pub threshold: Option<crate::regions::Threshold>,
    /// `--connectivity` of the edge measures.
    #[serde(default)]
    pub connectivity: crate::regions::Connectivity,
    /// `--measure-inset`: rows and columns at each side of a map left out of
    /// the components.
    #[serde(default)]
    pub inset: usize,
    /// How views map values to pixels.
    pub views: ViewsRecord,
}

/// Input handling and stages.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RecipeRecord {
    /// How images are read.
    pub input: InputHandling,
    /// The stages in order.
    pub stages: Vec<StageRecord>,
}

/// How images are read.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputHandling {
    /// Colour mode.
    pub color: String,
    /// Declared white level.
    pub white: Option<u32>,
    /// `apply` or `ignore` (EXIF orientation).
    pub orientation: String,
}

/// One stage of the resolved recipe.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "stage", rename_all = "lowercase")]
pub enum StageRecord {
    /// A conv stage with its whole bank.
    Conv {
        /// Bank name.
        bank: String,
        /// The bank's digest (see `Bank::digest`).
        bank_sha256: String,
        /// The bank as a bank file (TOML), so the run can be repeated even if
        /// the bank file changes.
        bank_file: String,
        /// Kernel names, in output order.
        kernels: Vec<String>,
        /// `convolve` or `correlate`.
        op: String,
        /// Pad mode.
        pad: String,
        /// Why that pad mode (a recipe file's or the command line's rule; see
        /// `stage::pads`); absent when the caller gave it in code.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        pad_reason: Option<String>,
        /// `valid`, `same`, `full`, or explicit padding.
        extent: ExtentRecord,
        /// Stride (rows, cols).
        stride: [usize; 2],
        /// Dilation (rows, cols).
        dilation: [usize; 2],
    },
    /// An activation.
    Act {
        /// Its name (with a slope for leaky-relu).
        act: String,
    },
    /// A pool.
    Pool {
        /// `max` or `mean`.
        pool: String,
        /// Window (rows, cols), or `global`.
        size: PoolSizeRecord,
        /// Stride (rows, cols); absent for a global pool.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        stride: Option<[usize; 2]>,
    },
    /// A combine stage.
    Combine {
        /// Its entries, in order.
        combine: Vec<CombineRecord>,
        /// Whether the maps before it stay.
        keep: bool,
    },
    /// A thin-edge stage.
    Thin {
        /// `canny`.
        thin: String,
        /// The x and y maps, when named.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        of: Option<Vec<String>>,
        /// Lower hysteresis threshold.
        low: f64,
        /// Upper hysteresis threshold.
        high: f64,
        /// The edge map's name, when given.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        name: Option<String>,
        /// Whether the maps before it stay.
        keep: bool,
    },
}

/// One entry of a combine stage, as a recipe file gives it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CombineRecord {
    /// Kind or built-in set (`magnitude`, `gradient`, …).
    pub kind: String,
    /// The maps read, when named (names, or indices as text).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub of: Option<Vec<String>>,
    /// The output's name, when given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub name: Option<String>,
    /// Weights of `weighted`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub weights: Option<Vec<f64>>,
    /// What `argmax` gives: `index` or `angle`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gives: Option<String>,
}

/// An extent by name, or explicit padding.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum ExtentRecord {
    /// `valid`, `same` or `full`.
    Named(String),
    /// Explicit padding in samples.
    Explicit {
        /// Rows above.
        top: usize,
        /// Rows below.
        bottom: usize,
        /// Columns on the left.
        left: usize,
        /// Columns on the right.
        right: usize,
    },
}

/// A pool window: a size, or the whole map.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum PoolSizeRecord {
    /// Rows and columns.
    Sized([usize; 2]),
    /// `global`.
    Global(String),
}

/// How views map values to pixels, for the whole run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ViewsRecord {
    /// `--view-range`, when fixed.
    pub range: Option<[f32; 2]>,
    /// `--view-png`: how the PNGs were compressed (their pixels do not depend on it).
    pub png: crate::render::ViewPng,
    /// The grey scale's inverse rule.
    pub grey: String,
    /// The diverging scale's inverse rule.
    pub diverging: String,
    /// How the diverging scale was built.
    pub diverging_method: String,
    /// Its two end colours (sRGB).
    pub diverging_endpoints: [[u8; 3]; 2],
    /// Its 256 colours, index 0 first.
    pub diverging_table: Vec<[u8; 3]>,
    /// The cyclic scale's inverse rule.
    #[serde(default)]
    pub cyclic: String,
    /// How the cyclic scale was built.
    #[serde(default)]
    pub cyclic_method: String,
    /// Its 256 colours, index 0 first.
    #[serde(default)]
    pub cyclic_table: Vec<[u8; 3]>,
}

/// Inputs, processed and failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct SummaryRecord {
    /// Inputs listed.
    pub inputs: usize,
    /// Processed without error.
    pub processed: usize,
    /// Failed.
    pub failed: usize,
}

/// The whole sorted input list of a job.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ListRecord {
    /// Inputs listed.
    pub count: usize,
    /// SHA-256 over each input's relative path and where it was read from.
    pub sha256: String,
}

/// What a followed run (`apply --follow`) saw, from its start to its stop.
/// Lags run from a file's arrival (the last change tapmap saw of it) to its
/// journal entry (its outputs on disk); files that were there at the start
/// are not counted in them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FollowRecord {
    /// `events` (the operating system's file events) or `poll`.
    pub watch: String,
    /// Polling interval in seconds, with `--poll`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub poll_s: Option<f64>,
    /// Settle time in seconds.
    pub settle_s: f64,
    /// Files taken while following (arrived after the start, or changed).
    pub arrived: usize,
    /// Of these, files processed again because they changed after an earlier
    /// result (their rows supersede the earlier ones).
    pub redone: Vec<String>,
    /// Median and 99th percentile of the lag, seconds (none when no file
    /// arrived while following).
    pub lag_p50_s: Option<f64>,
    /// See `lag_p50_s`.
    pub lag_p99_s: Option<f64>,
    /// The largest backlog seen (files complete and waiting for a worker).
    pub most_queued: usize,
    /// Files still settling or queued when the follower stopped (taken by
    /// the next run of the same command).
    pub left_waiting: usize,
}

/// A stopped run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Interrupted {
    /// The signal that stopped it (0: asked without a signal).
    pub signal: i32,
    /// Inputs not started.
    pub not_run: usize,
}

/// One shard's run, in a merged manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShardRun {
    /// Its folder below the merged output.
    pub folder: String,
    /// `K/N`.
    pub shard: Option<String>,
    /// Its command line.
    pub command_line: Vec<String>,
    /// Its start.
    pub started: Option<String>,
    /// Its end.
    pub finished: Option<String>,
    /// Its wall time.
    pub seconds: Option<f64>,
    /// Its threads.
    pub threads: Option<usize>,
    /// Its inputs, processed and failed.
    pub summary: SummaryRecord,
}

/// A file with its size, relative to the run's folder (`/` separated).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileRecord {
    /// Path below the run's folder.
    pub path: String,
    /// Size in bytes.
    pub bytes: u64,
    /// Last modification, nanoseconds since 1970 (an input's outputs; what
    /// `--resume` checks, beside the size, to tell a file changed in place).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub modified: Option<u64>,
}

impl FileRecord {
    /// The record of the file at `path` as it is now, named `rel`.
    pub fn of(path: &Path, rel: String) -> Result<FileRecord, Error> {
        let m = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
        Ok(FileRecord {
            path: rel,
            bytes: m.len(),
            modified: modified_ns(&m),
        })
    }

    /// The file's path below its run folder.
    pub fn path_buf(&self) -> std::path::PathBuf {
        crate::jobs::inputs::path_from_text(&self.path)
            .unwrap_or_else(|| std::path::PathBuf::from(&self.path))
    }

    /// Whether the file at `path` is still what this record says.
    pub fn still(&self, path: &Path) -> bool {
        std::fs::metadata(path)
            .is_ok_and(|m| m.is_file() && m.len() == self.bytes && modified_ns(&m) == self.modified)
    }
}

fn modified_ns(m: &std::fs::Metadata) -> Option<u64> {
    m.modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map(|d| d.as_nanos() as u64)
}

/// One view and its value mapping.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ViewRecord {
    /// Channel index.
    pub channel: usize,
    /// Channel name.
    pub name: String,
    /// File below the run's folder.
    pub file: String,
    /// The mapping from values to pixels.
    #[serde(flatten)]
    pub mapping: ViewMapping,
}

/// One input's entry.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputRecord {
    /// Relative path.
    pub path: String,
    /// SHA-256 of its bytes, when it could be read.
    pub sha256: Option<String>,
    /// `ok` or `failed`.
    pub status: String,
    /// Why it failed.
    pub error: Option<String>,
    /// Files written for it.
    pub outputs: Vec<FileRecord>,
    /// Its views.
    pub views: Vec<ViewRecord>,
}

/// The record of a recipe: input handling and stages, banks whole.
pub fn recipe_record(spec: &RecipeSpec) -> RecipeRecord {
    let mut convs = 0;
    let stages = spec
        .recipe
        .stages
        .iter()
        .map(|s| match s {
            Stage::Conv(c) => {
                let pad_reason = spec.pads.get(convs).map(ToString::to_string);
                convs += 1;
                let o = &c.options;
                let extent = match o.extent {
                    Extent::Explicit(p) => ExtentRecord::Explicit {
                        top: p.top,
                        bottom: p.bottom,
                        left: p.left,
                        right: p.right,
                    },
                    e => ExtentRecord::Named(e.to_string()),
                };
                StageRecord::Conv {
                    bank: c.bank.name.clone(),
                    bank_sha256: c.bank.digest(),
                    bank_file: bank_to_toml(&c.bank).unwrap_or_default(),
                    kernels: c.bank.kernels.iter().map(|k| k.name.clone()).collect(),
                    op: c.op().name().into(),
                    pad: o.pad.name().into(),
                    pad_reason,
                    extent,
                    stride: [o.stride.0, o.stride.1],
                    dilation: [o.dilation.0, o.dilation.1],
                }
            }
            Stage::Act(a) => StageRecord::Act { act: a.to_string() },
            Stage::Combine(c) => StageRecord::Combine {
                combine: c.items.iter().map(combine_record).collect(),
                keep: c.keep,
            },
            Stage::Thin(t) => StageRecord::Thin {
                thin: "canny".into(),
                of: t
                    .of
                    .as_ref()
                    .map(|v| v.iter().map(ToString::to_string).collect()),
                low: t.low,
                high: t.high,
                name: t.name.clone(),
                keep: t.keep,
            },
            Stage::Pool(p) => match p.window {
                PoolWindow::Global => StageRecord::Pool {
                    pool: p.kind.to_string(),
                    size: PoolSizeRecord::Global("global".into()),
                    stride: None,
                },
                PoolWindow::Sized { size, stride } => StageRecord::Pool {
                    pool: p.kind.to_string(),
                    size: PoolSizeRecord::Sized([size.0, size.1]),
                    stride: Some([stride.0, stride.1]),
                },
            },
        })
        .collect();
    RecipeRecord {
        input: InputHandling {
            color: spec.input.color.name().into(),
            white: spec.input.white,
            orientation: if spec.input.apply_orientation {
                "apply"
            } else {
                "ignore"
            }
            .into(),
        },
        stages,
    }
}

fn combine_record(item: &crate::stage::CombineItem) -> CombineRecord {
    use crate::stage::combine::{CombineKind, Gives, Preset};
    use crate::stage::CombineWhat;
    let (kind, weights, gives) = match &item.what {
        CombineWhat::Kind(k) => (
            k.name().to_string(),
            match k {
                CombineKind::Weighted(w) => Some(w.clone()),
                _ => None,
            },
            match k {
                CombineKind::Argmax(Gives::Index) => Some("index".to_string()),
                CombineKind::Argmax(Gives::Angle) => Some("angle".to_string()),
                _ => None,
            },
        ),
        CombineWhat::Preset(Preset::Gradient) => ("gradient".into(), None, None),
        CombineWhat::Preset(Preset::GaborEnergy) => ("gabor-energy".into(), None, None),
    };
    CombineRecord {
        kind,
        of: item
            .of
            .as_ref()
            .map(|v| v.iter().map(ToString::to_string).collect()),
        name: item.name.clone(),
        weights,
        gives,
    }
}

/// The view rules of a run with `range` fixed (or per map).
pub fn views_record(range: Option<(f32, f32)>, png: crate::render::ViewPng) -> ViewsRecord {
    ViewsRecord {
        range: range.map(|(a, b)| [a, b]),
        png,
        grey: "level L of D (D = levels) stands for lo + L/D·(hi − lo)".into(),
        diverging: "table index i (0–255, the pixel of the indexed PNG) stands for \
                    (i − 127.5)/127.5·hi when i ≥ 127.5, (i − 127.5)/127.5·|lo| below"
            .into(),
        diverging_method: "Moreland 2009, Msh interpolation".into(),
        diverging_endpoints: [colormap::NEGATIVE, colormap::POSITIVE],
        diverging_table: colormap::table(),
        cyclic: "table index i (0–255) stands for lo + i/256·(hi − lo); lo and hi are one \
                 direction"
            .into(),
        cyclic_method: format!(
            "straight lines in CIELAB round the anchors {:?}",
            colormap::CYCLIC_ANCHORS
        ),
        cyclic_table: colormap::cyclic_table(),
    }
}

/// The first two fields of a manifest, read before the rest.
#[derive(Deserialize)]
struct Head {
    format: Option<String>,
    #[serde(alias = "journal_version")]
    manifest_version: Option<u32>,
}

/// Checks that `text` is a file of tapmap's of kind `format` in this tapmap's
/// layout `version` (the `manifest_version` or `journal_version` field).
/// `path` names the file in messages.
pub fn check_format(text: &str, path: &Path, format: &str, version: u32) -> Result<(), Error> {
    let head: Head = serde_json::from_str(text)
        .map_err(|e| Error::record(path, format!("is not a tapmap {format} file: {e}")))?;
    match (head.format.as_deref(), head.manifest_version) {
        (Some(f), Some(v)) if f == format && v == version => Ok(()),
        (Some(f), Some(v)) if f == format && v > version => Err(Error::record(
            path,
            format!(
                "was written by a newer tapmap (layout {v}; this tapmap reads layout {version}); \
                 use that tapmap, or run the job again with this one"
            ),
        )),
        (Some(f), Some(v)) if f == format => Err(Error::record(
            path,
            format!("has layout {v}, which this tapmap (layout {version}) does not read"),
        )),
        _ => Err(Error::record(
            path,
            format!("is not a tapmap {format} file (no \"format\": \"{format}\" in it)"),
        )),
    }
}

/// Reads a manifest, checking its format and layout first.
pub fn read_manifest(path: &Path) -> Result<Manifest, Error> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    check_format(&text, path, MANIFEST_FORMAT, MANIFEST_VERSION)?;
    serde_json::from_str(&text)
        .map_err(|e| Error::record(path, format!("does not read as a manifest: {e}")))
}

/// Writes a manifest (pretty JSON) atomically; returns its size.
pub fn write_manifest(path: &Path, m: &Manifest) -> Result<u64, Error> {
    let text = serde_json::to_string_pretty(m).map_err(|e| Error::io(path, e.into()))?;
    crate::image_io::atomic::write_atomic(path, |w| w.write_all(text.as_bytes()))?;
    Ok(text.len() as u64)
}
