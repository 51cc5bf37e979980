//! The tables tapmap writes, as typed rows, and the one way every CSV of
//! tapmap's is written.
//!
//! **One policy for numbers**, in every CSV (stats.csv, images.csv, probe.csv,
//! borders.csv, bands.csv, summary.csv): a number is written in Rust's shortest
//! decimal form that reads back to the same value ([`number`]); a value that is
//! missing (a failed input's width, a statistic of a map with no finite
//! samples, a crop figure without a crop study) is an empty field, never `NaN`
//! or `inf`. The schemas in `shared/schemas/` say so for each column.
//!
//! Rows come in input order (sorted by relative path) and channel order, so the
//! tables are the same whatever order the worker threads finished in.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::image_io::ImageMeta;
use crate::jobs::manifest::InputRecord;
use crate::stats::MapStats;

/// A number for a CSV field: the shortest decimal that reads back to the same
/// value of its own type (f32 or f64); empty when not finite.
pub fn number<T: Copy + std::fmt::Display + Into<f64>>(v: T) -> String {
    if v.into().is_finite() {
        format!("{v}")
    } else {
        String::new()
    }
}

/// An optional value for a CSV field: empty when missing.
pub fn optional<T: ToString>(v: &Option<T>) -> String {
    v.as_ref().map_or(String::new(), T::to_string)
}

/// An optional number for a CSV field: empty when missing or not finite.
pub fn optional_number(v: Option<f64>) -> String {
    v.map_or(String::new(), number)
}

/// CSV text: a header line, then the rows (RFC 4180 quoting by the csv crate).
pub fn csv_bytes(header: &[&str], rows: impl IntoIterator<Item = Vec<String>>) -> Vec<u8> {
    let mut bytes = csv_lines(std::iter::once(
        header.iter().map(|h| h.to_string()).collect(),
    ));
    bytes.extend(csv_lines(rows));
    bytes
}

/// CSV lines of `rows` without a header, as [`csv_bytes`] writes them: what
/// a table that grows row by row appends.
pub fn csv_lines(rows: impl IntoIterator<Item = Vec<String>>) -> Vec<u8> {
    let mut w = csv::Writer::from_writer(Vec::new());
    // Writing records into memory cannot fail.
    for r in rows {
        let fields: Vec<std::borrow::Cow<'_, str>> = r.iter().map(|f| visible(f)).collect();
        w.write_record(fields.iter().map(|f| f.as_bytes()))
            .expect("in memory");
    }
    w.into_inner().expect("in memory")
}

/// A field with its control characters (NUL, tab, line breaks, escape, …)
/// written `\xNN`, so that every row is one line a person can read and no
/// terminal is driven by a kernel's name.
fn visible(field: &str) -> std::borrow::Cow<'_, str> {
    if !field.chars().any(char::is_control) {
        return std::borrow::Cow::Borrowed(field);
    }
    let mut out = String::with_capacity(field.len() + 8);
    for c in field.chars() {
        if c.is_control() {
            if (c as u32) < 0x100 {
                out.push_str(&format!("\\x{:02x}", c as u32));
            } else {
                out.push_str(&format!("\\u{{{:04x}}}", c as u32));
            }
        } else {
            out.push(c);
        }
    }
    std::borrow::Cow::Owned(out)
}

/// Writes a CSV file atomically (see [`csv_bytes`]).
pub fn write_csv(
    path: &Path,
    header: &[&str],
    rows: impl IntoIterator<Item = Vec<String>>,
) -> Result<u64, Error> {
    let bytes = csv_bytes(header, rows);
    write_atomic(path, |out| out.write_all(&bytes))?;
    Ok(bytes.len() as u64)
}

/// Column names of `stats.csv`.
pub const STATS_COLUMNS: [&str; 25] = [
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
    "threshold",
    "components",
    "largest_area",
    "largest_x0",
    "largest_y0",
    "largest_x1",
    "largest_y1",
    "largest_cx",
    "largest_cy",
];

/// One `stats.csv` row: one map of one image.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StatsRow {
    /// Input path (relative, `/`).
    pub path: String,
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
    /// The edge measures, with `--threshold`.
    #[serde(default)]
    pub regions: Option<crate::regions::Regions>,
}

impl StatsRow {
    /// The CSV fields, in [`STATS_COLUMNS`] order.
    pub fn fields(&self) -> Vec<String> {
        let m = &self.stats;
        let mut row = vec![
            self.path.clone(),
            self.channel.to_string(),
            self.name.clone(),
            self.width.to_string(),
            self.height.to_string(),
            optional_number(m.min),
            optional_number(m.max),
            optional_number(m.mean),
            optional_number(m.std),
            optional_number(m.p1),
            optional_number(m.p50),
            optional_number(m.p99),
            number(m.zero_fraction),
            optional_number(m.above_fraction),
            m.count.to_string(),
            m.non_finite.to_string(),
        ];
        let g = self.regions.as_ref();
        let l = g.and_then(|g| g.largest);
        let whole = |v: Option<u64>| v.map_or_else(String::new, |v| v.to_string());
        row.extend([
            optional_number(g.map(|g| g.threshold)),
            whole(g.map(|g| g.components)),
            whole(g.map(|_| l.map_or(0, |l| l.area))),
            whole(l.map(|l| u64::from(l.x0))),
            whole(l.map(|l| u64::from(l.y0))),
            whole(l.map(|l| u64::from(l.x1))),
            whole(l.map(|l| u64::from(l.y1))),
            optional_number(l.map(|l| l.cx)),
            optional_number(l.map(|l| l.cy)),
        ]);
        row
    }
}

/// Column names of `images.csv`.
pub const IMAGES_COLUMNS: [&str; 16] = [
    "path",
    "sha256",
    "width",
    "height",
    "bit_depth",
    "sample",
    "converted",
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

/// One `images.csv` row: one input, failed or not.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ImageRow {
    /// Input path (relative, `/`).
    pub path: String,
    /// SHA-256 of the input's bytes, when it could be read.
    pub sha256: Option<String>,
    /// What the file said about itself, when it decoded.
    pub meta: Option<ImageMeta>,
    /// `None` when processed, else why it failed.
    pub error: Option<String>,
    /// `.npy` map files written for it.
    pub maps_written: usize,
}

impl ImageRow {
    /// The CSV fields, in [`IMAGES_COLUMNS`] order.
    pub fn fields(&self) -> Vec<String> {
        let known = |f: &dyn Fn(&ImageMeta) -> String| self.meta.as_ref().map_or(String::new(), f);
        vec![
            self.path.clone(),
            optional(&self.sha256),
            known(&|m| m.width.to_string()),
            known(&|m| m.height.to_string()),
            known(&|m| m.bit_depth.to_string()),
            known(&|m| (if m.float { "float" } else { "int" }).to_string()),
            // Every map is computed in float32 (see crate::image_io::npy).
            known(&|m| {
                (if m.float && m.bit_depth > 32 {
                    "float64 to float32"
                } else {
                    ""
                })
                .to_string()
            }),
            known(&|m| m.color.clone()),
            known(&|m| optional(&m.white)),
            known(&|m| optional(&m.orientation)),
            known(&|m| m.orientation_applied.to_string()),
            known(&|m| optional(&m.captured)),
            known(&|m| m.exposure.map_or(String::new(), number)),
            if self.error.is_none() { "ok" } else { "failed" }.to_string(),
            optional(&self.error),
            self.maps_written.to_string(),
        ]
    }
}

/// One input's finished result: its `images.csv` row, its `stats.csv` rows, the
/// files written for it and its manifest entry. A run keeps these (in
/// `journal.jsonl`, see [`crate::jobs::apply`]) so that `--resume` and `merge`
/// write exactly the tables one uninterrupted run writes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Finished {
    /// The `images.csv` row.
    pub image: ImageRow,
    /// The `stats.csv` rows.
    pub stats: Vec<StatsRow>,
    /// The manifest's entry for this input (its files, with sizes, and views).
    pub entry: InputRecord,
}

impl Finished {
    /// Relative path of the input.
    pub fn path(&self) -> &str {
        &self.image.path
    }

    /// Whether it was processed without error.
    pub fn ok(&self) -> bool {
        self.image.error.is_none()
    }

    /// The same result seen from a folder above the run's: output paths get
    /// `prefix/` in front (used by `merge` for shard folders).
    pub fn under(mut self, prefix: &str) -> Self {
        let add = |p: &mut String| *p = format!("{prefix}/{p}");
        self.entry.outputs.iter_mut().for_each(|o| add(&mut o.path));
        self.entry.views.iter_mut().for_each(|v| add(&mut v.file));
        self
    }
}

/// `stats.csv` and `images.csv` of finished inputs into `dir` (stats only
/// when `stats`); returns the files written with their sizes.
pub fn write_tables(
    dir: &Path,
    done: &[Finished],
    stats: bool,
) -> Result<Vec<crate::jobs::manifest::FileRecord>, Error> {
    let mut files = Vec::new();
    if stats {
        let rows = done
            .iter()
            .flat_map(|d| d.stats.iter().map(StatsRow::fields));
        let bytes = write_csv(&dir.join("stats.csv"), &STATS_COLUMNS, rows)?;
        files.push(crate::jobs::manifest::FileRecord {
            path: "stats.csv".into(),
            bytes,
            modified: None,
        });
    }
    let rows = done.iter().map(|d| d.image.fields());
    let bytes = write_csv(&dir.join("images.csv"), &IMAGES_COLUMNS, rows)?;
    files.push(crate::jobs::manifest::FileRecord {
        path: "images.csv".into(),
        bytes,
        modified: None,
    });
    Ok(files)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_policy_for_numbers_and_missing_values() {
        assert_eq!(number(0.1), "0.1");
        assert_eq!(number(0.1f32), "0.1");
        assert_eq!(number(1e-7), "0.0000001");
        assert_eq!(number(f64::NAN), "");
        assert_eq!(number(f64::INFINITY), "");
        assert_eq!(optional_number(None), "");
        assert_eq!(optional::<u32>(&None), "");
        assert_eq!(
            String::from_utf8(csv_bytes(&["a", "b"], [vec!["x,y".into(), "".into()]])).unwrap(),
            "a,b\n\"x,y\",\n"
        );
    }
}
