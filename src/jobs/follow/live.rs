//! What a followed run keeps up to date while it runs: `images.csv` and
//! `stats.csv` growing by whole lines as each image is done, and the status
//! (counts, rate, lag) for the terminal and the status log.
//!
//! The tables start as the journal's results in table order; each result is
//! then appended, one write per table, after its journal entry. A crash can
//! leave a result in the journal and not yet in the tables, never the other
//! way round; the next start writes the tables afresh from the journal. An
//! input processed again because it changed gets new rows, its `images.csv`
//! status `redone`: they supersede its earlier rows. At the stop the tables
//! are written once more in table order, one set of rows per input, as a
//! batch run writes them.

use std::collections::VecDeque;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::time::{Duration, Instant, SystemTime};

use serde::Serialize;

use crate::error::Error;
use crate::jobs::tables::{csv_lines, write_tables, Finished, StatsRow, IMAGES_COLUMNS};

/// The `images.csv` status of a row that supersedes an earlier one.
pub const REDONE: &str = "redone";

/// The two tables, open for appending.
pub(crate) struct LiveTables {
    images: Mutex<(PathBuf, std::fs::File)>,
    stats: Option<Mutex<(PathBuf, std::fs::File)>>,
}

fn open_append(path: PathBuf) -> Result<Mutex<(PathBuf, std::fs::File)>, Error> {
    let file = std::fs::OpenOptions::new()
        .append(true)
        .open(&path)
        .map_err(|e| Error::io(&path, e))?;
    Ok(Mutex::new((path, file)))
}

fn append(table: &Mutex<(PathBuf, std::fs::File)>, bytes: &[u8]) -> Result<(), Error> {
    let mut t = table.lock().unwrap_or_else(|p| p.into_inner());
    let (path, file) = &mut *t;
    file.write_all(bytes)
        .map_err(|e| Error::io(path.clone(), e))
}

impl LiveTables {
    /// Writes the tables of `done` (in table order) into `dir` and opens
    /// them for appending; `stats.csv` only when `stats`.
    pub fn start(dir: &Path, done: &[Finished], stats: bool) -> Result<LiveTables, Error> {
        write_tables(dir, done, stats)?;
        Ok(LiveTables {
            images: open_append(dir.join("images.csv"))?,
            stats: stats
                .then(|| open_append(dir.join("stats.csv")))
                .transpose()?,
        })
    }

    /// Appends one result's rows, each table in one write.
    pub fn append(&self, done: &Finished, redone: bool) -> Result<(), Error> {
        if let Some(stats) = &self.stats {
            append(stats, &csv_lines(done.stats.iter().map(StatsRow::fields)))?;
        }
        let mut row = done.image.fields();
        if redone && done.ok() {
            let status = IMAGES_COLUMNS
                .iter()
                .position(|c| *c == "status")
                .expect("images.csv has a status column");
            row[status] = REDONE.into();
        }
        append(&self.images, &csv_lines([row]))
    }
}

/// Counts and times for the status line and log.
pub(crate) struct Status {
    start: Instant,
    /// Finish times of the last [`RATE_WINDOW`], for the rate.
    recent: VecDeque<Instant>,
    /// Lags of the last [`LAG_WINDOW`] files that arrived while following.
    recent_lags: VecDeque<f64>,
    /// Every lag of the run, for its record (4 bytes a file).
    all_lags: Vec<f32>,
    pub processed: usize,
    pub failed: usize,
    pub resumed: usize,
    pub arrived: usize,
    pub most_queued: usize,
}

/// The rate counts the files done in this window before now.
pub const RATE_WINDOW: Duration = Duration::from_secs(10);
/// The status line's lag percentiles are over this many last files.
pub const LAG_WINDOW: usize = 1000;

/// One status, as shown and logged (schema: `shared/schemas/follow-status.schema.json`).
#[derive(Debug, Clone, Serialize)]
pub struct StatusLine {
    /// Always `tapmap-follow-status`.
    pub format: &'static str,
    /// The layout of this line: 1.
    pub status_version: u32,
    /// Wall-clock time of the line, RFC 3339 UTC.
    pub time: String,
    /// Seconds since the follower started.
    pub seconds: f64,
    /// Images with results written by this run (ok or failed).
    pub processed: usize,
    /// Of these, images that failed.
    pub failed: usize,
    /// Images whose earlier results were kept (resume).
    pub resumed: usize,
    /// Complete files waiting for a worker.
    pub queued: usize,
    /// Files seen but not yet complete (inside the settle time).
    pub settling: usize,
    /// Images being processed now.
    pub in_flight: usize,
    /// Images finished per second over the last `RATE_WINDOW`.
    pub files_per_s: f64,
    /// Median lag from arrival to outputs on disk, seconds, over the last
    /// `LAG_WINDOW` files that arrived while following.
    pub lag_p50_s: Option<f64>,
    /// 99th percentile of the same lag.
    pub lag_p99_s: Option<f64>,
}

/// The nearest-rank percentile `p` (0–100) of `v`, sorted here.
pub fn percentile(v: &mut [f64], p: f64) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let rank = ((p / 100.0) * v.len() as f64).ceil() as usize;
    Some(v[rank.clamp(1, v.len()) - 1])
}

impl Status {
    pub fn new(start: Instant) -> Self {
        Status {
            start,
            recent: VecDeque::new(),
            recent_lags: VecDeque::new(),
            all_lags: Vec::new(),
            processed: 0,
            failed: 0,
            resumed: 0,
            arrived: 0,
            most_queued: 0,
        }
    }

    /// One file done at `at`; `lag` when it arrived while following.
    pub fn done(&mut self, at: Instant, ok: bool, lag: Option<Duration>) {
        if ok {
            self.processed += 1;
        } else {
            self.failed += 1;
        }
        self.recent.push_back(at);
        if let Some(l) = lag {
            self.recent_lags.push_back(l.as_secs_f64());
            if self.recent_lags.len() > LAG_WINDOW {
                self.recent_lags.pop_front();
            }
            self.all_lags.push(l.as_secs_f32());
        }
    }

    /// The status at `now`.
    pub fn line(
        &mut self,
        now: Instant,
        queued: usize,
        settling: usize,
        in_flight: usize,
    ) -> StatusLine {
        while self
            .recent
            .front()
            .is_some_and(|t| now.duration_since(*t) > RATE_WINDOW)
        {
            self.recent.pop_front();
        }
        let window = now
            .duration_since(self.start)
            .min(RATE_WINDOW)
            .as_secs_f64();
        let mut lags: Vec<f64> = self.recent_lags.iter().copied().collect();
        StatusLine {
            format: "tapmap-follow-status",
            status_version: 1,
            time: humantime::format_rfc3339_millis(SystemTime::now()).to_string(),
            seconds: now.duration_since(self.start).as_secs_f64(),
            processed: self.processed,
            failed: self.failed,
            resumed: self.resumed,
            queued,
            settling,
            in_flight,
            files_per_s: if window > 0.0 {
                self.recent.len() as f64 / window
            } else {
                0.0
            },
            lag_p50_s: percentile(&mut lags, 50.0),
            lag_p99_s: percentile(&mut lags, 99.0),
        }
    }

    /// The run's lag percentiles (p50, p99) over every file that arrived
    /// while following.
    pub fn run_lags(&self) -> (Option<f64>, Option<f64>) {
        let mut all: Vec<f64> = self.all_lags.iter().map(|&l| f64::from(l)).collect();
        let p50 = percentile(&mut all, 50.0);
        (p50, percentile(&mut all, 99.0))
    }
}

impl StatusLine {
    /// For people: one line.
    pub fn text(&self) -> String {
        let lag = match (self.lag_p50_s, self.lag_p99_s) {
            (Some(a), Some(b)) => format!("lag p50 {a:.2} s p99 {b:.2} s"),
            _ => "lag -".into(),
        };
        format!(
            "following: {} done, {} failed, {} queued, {} settling, {:.2} files/s, {lag}",
            self.processed, self.failed, self.queued, self.settling, self.files_per_s
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nearest_rank_percentiles() {
        // Nearest-rank method: the smallest value with at least p % of the
        // values at or below it (common practice, no source).
        let mut v: Vec<f64> = (1..=100).map(f64::from).rev().collect();
        assert_eq!(percentile(&mut v, 50.0), Some(50.0));
        assert_eq!(percentile(&mut v, 99.0), Some(99.0));
        assert_eq!(percentile(&mut v, 100.0), Some(100.0));
        assert_eq!(percentile(&mut [3.0], 99.0), Some(3.0));
        assert_eq!(percentile(&mut [], 50.0), None);
    }
}
