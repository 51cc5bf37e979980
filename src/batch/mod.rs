//! The batch job behind `tapmap apply`: inputs, parallel processing with bounded
//! memory, outputs written whole or not at all, tables and the manifest.
//!
//! Output layout under `--out DIR`, mirroring each input's relative path `P`
//! (without its extension):
//!
//! ```text
//! DIR/maps/P.npy                 float32 C×H×W
//! DIR/tiff/P/NN-<channel>.tif    32-bit float, one file per channel (optional)
//! DIR/views/P/NN-<channel>.png   one picture per map
//! DIR/sheets/P.png               all maps of the image beside its source
//! DIR/stats.csv                  one row per image and channel
//! DIR/images.csv                 one row per input, failures included
//! DIR/manifest.json              everything needed to repeat the run
//! ```

pub mod inputs;
pub mod merge;
pub mod run;
pub mod shard;
pub mod tables;

use std::fmt;
use std::str::FromStr;

/// Which outputs a run writes (`images.csv` is always written).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Save {
    /// `.npy` maps.
    pub maps: bool,
    /// 32-bit float TIFF per channel.
    pub tiff: bool,
    /// PNG view per map.
    pub views: bool,
    /// PNG sheet per image.
    pub sheets: bool,
    /// `stats.csv`.
    pub stats: bool,
    /// `manifest.json`.
    pub manifest: bool,
}

impl Default for Save {
    fn default() -> Self {
        Save {
            maps: true,
            tiff: false,
            views: true,
            sheets: false,
            stats: true,
            manifest: true,
        }
    }
}

const SAVE_NAMES: [&str; 6] = ["maps", "tiff", "views", "sheets", "stats", "manifest"];

impl Save {
    fn flags(&self) -> [bool; 6] {
        [
            self.maps,
            self.tiff,
            self.views,
            self.sheets,
            self.stats,
            self.manifest,
        ]
    }
}

impl FromStr for Save {
    type Err = String;
    /// A comma-separated list of maps, tiff, views, sheets, stats, manifest, or `all`.
    fn from_str(s: &str) -> Result<Self, String> {
        let mut f = [false; 6];
        for part in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            if part == "all" {
                f = [true; 6];
                continue;
            }
            let i = SAVE_NAMES.iter().position(|n| *n == part).ok_or_else(|| {
                format!(
                    "unknown output '{part}'; choose from {} or all",
                    SAVE_NAMES.join(", ")
                )
            })?;
            f[i] = true;
        }
        Ok(Save {
            maps: f[0],
            tiff: f[1],
            views: f[2],
            sheets: f[3],
            stats: f[4],
            manifest: f[5],
        })
    }
}

impl fmt::Display for Save {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let on: Vec<&str> = SAVE_NAMES
            .iter()
            .zip(self.flags())
            .filter(|(_, b)| *b)
            .map(|(n, _)| *n)
            .collect();
        f.write_str(&on.join(","))
    }
}

/// How views are drawn.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ViewOptions {
    /// Fixed value range for every view; `None`: per map.
    pub range: Option<(f32, f32)>,
    /// 16-bit grey views.
    pub depth16: bool,
}

pub use run::{run_apply, ApplyJob, Summary};
